"""Near-duplicate quality on public photos: recall per edit, and the margin to distinct photos.

Every photo of bench/photoset.py (scikit-image, scikit-learn and matplotlib sample photos) is stored
as a JPEG original plus one file per edit (low JPEG quality, rescale, blur, brightness, contrast,
format change, border crops up to 8% per side, small corner stamps). Every file is decoded the way
the inspect stage decodes, hashed with the [hashes] settings, and grouped by the neardup stage
itself. Reported:
- recall: share of edited copies that land in their original's group, per edit and overall, and
  the share within the radius of their original directly (no chaining through other copies);
- merges: groups that hold two different photos (target: zero);
- margin: the smallest distance between views of two different photos, next to the largest
  distance of an edited copy to its original (the radius must sit between them);
- the same distances for plain pHash (one code of the whole picture, no crops, no mask).
The stereo pair (two cameras, one scene) is reported on its own.

    .venv/bin/python bench/neardup_quality.py [--json] [--large] [--radius 8] [--semantic]
"""
from __future__ import annotations

import argparse
import collections
import dataclasses
import hashlib
import json
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "bench"))

from curate import hashing  # noqa: E402
from curate.config import DecideConfig, PipelineConfig  # noqa: E402
from curate.stages import hashes as hashes_mod  # noqa: E402
from curate.stages import neardup  # noqa: E402
from curate.stages.base import StageContext  # noqa: E402

import photoset  # noqa: E402


def build_corpus(large: bool, seed: int) -> list[dict]:
    """One record per file: photo, family, edit, bytes, decoded RGB image."""
    from PIL import Image

    out = []
    for name in list(photoset.PHOTOS) + list(photoset.STEREO_PAIR):
        img = photoset.load_photo(name)
        if large:  # big enough that inspect decodes the JPEG original in draft mode
            img = img.resize((img.width * 3, img.height * 3), Image.Resampling.BICUBIC)
        files = [("original", "original", photoset.original_bytes(img))] + photoset.variants(name, img, seed)
        for fam, edit, data in files:
            out.append({"photo": name, "family": fam, "edit": edit, "bytes": data,
                        "image": photoset.decode_like_inspect(data)})
    return out


def neardup_table(corpus: list[dict], hcfg, emb: np.ndarray | None):
    import pyarrow as pa

    col = hashes_mod.codes_column(hcfg)
    rows = {"sample_id": [], "source": [], "decoded": [], "width": [], "height": [], "sha256": [], col: []}
    for r in corpus:
        rows["sample_id"].append(f"{r['photo']}/{r['edit']}")
        rows["source"].append(f"{r['photo']}/{r['edit']}")
        rows["decoded"].append(True)
        rows["width"].append(r["image"].width)
        rows["height"].append(r["image"].height)
        rows["sha256"].append(hashlib.sha256(r["bytes"]).hexdigest())
        rows[col].append(r["codes"])
    fields = [pa.field("sample_id", pa.string()), pa.field("source", pa.string()), pa.field("decoded", pa.bool_()),
              pa.field("width", pa.int32()), pa.field("height", pa.int32()), pa.field("sha256", pa.string()),
              *hashes_mod.hash_fields(hcfg)]
    t = pa.Table.from_arrays([pa.array(rows[f.name], type=f.type) for f in fields], schema=pa.schema(fields))
    if emb is not None:
        t = t.append_column("image_emb", pa.FixedSizeListArray.from_arrays(pa.array(emb.astype(np.float16).ravel()), emb.shape[1]))
    return t


def embed_demo(corpus: list[dict]) -> np.ndarray:
    import torch

    from curate.models.clip import load_model

    lm = load_model("demo", "", device="cpu")
    steps = lm.pil_steps()
    out = []
    for r in corpus:
        img = r["image"]
        for s in steps:
            img = s(img)
        arr = np.array(img.convert("RGB"))
        out.append(lm.encode_images(torch.from_numpy(arr[None]))[0])
    return np.asarray(out, dtype=np.float32)


def distances(corpus: list[dict], codes: np.ndarray, radius: int) -> dict:
    """Largest copy-to-original distance per edit, the share of copies within the radius of their
    original directly (no chaining through other copies), and the closest pair of different photos."""
    photos = np.array([r["photo"] for r in corpus])
    stereo = np.isin(photos, list(photoset.STEREO_PAIR))
    orig = {r["photo"]: i for i, r in enumerate(corpus) if r["family"] == "original"}
    per_edit: dict[str, list[int]] = collections.defaultdict(list)
    for i, r in enumerate(corpus):
        if r["family"] != "original":
            per_edit[r["edit"]].append(hashing.min_distance(codes[i], codes[orig[r["photo"]]]))
    d = hashing.hamming(codes[:, None, :, None], codes[None, :, None, :]).min(axis=(2, 3)).astype(np.int64)
    different = (photos[:, None] != photos[None, :]) & ~(stereo[:, None] & stereo[None, :])
    masked = np.where(different, d, 999)
    i, j = np.unravel_index(int(masked.argmin()), masked.shape)
    s = orig.get("motorcycle_left"), orig.get("motorcycle_right")
    direct = [x <= radius for v in per_edit.values() for x in v]
    return {
        "pair_recall": float(np.mean(direct)),
        "copy_max_by_edit": {k: int(max(v)) for k, v in per_edit.items()},
        "copy_max": int(max(max(v) for v in per_edit.values())),
        "distinct_min": int(masked.min()),
        "distinct_min_pair": [f"{corpus[i]['photo']}/{corpus[i]['edit']}", f"{corpus[j]['photo']}/{corpus[j]['edit']}"],
        "stereo_pair_distance": int(d[s[0], s[1]]) if None not in s else None,
    }


def grouping(corpus: list[dict], table, hcfg, ncfg) -> dict:
    cfg = PipelineConfig({"hashes": hcfg, "neardup": ncfg, "decide": DecideConfig()})
    out = neardup.run(table, ncfg, StageContext(config=cfg))
    gid = out.column("group_id").to_pylist()
    signal = out.column("dup_signal").to_pylist()
    photos = [r["photo"] for r in corpus]
    orig = {r["photo"]: i for i, r in enumerate(corpus) if r["family"] == "original"}
    hits: dict[str, list[bool]] = collections.defaultdict(list)
    fam_hits: dict[str, list[bool]] = collections.defaultdict(list)
    for i, r in enumerate(corpus):
        if r["family"] == "original":
            continue
        ok = gid[i] == gid[orig[r["photo"]]]
        hits[r["edit"]].append(ok)
        fam_hits[r["family"]].append(ok)
    members: dict[str, set] = collections.defaultdict(set)
    for g, p in zip(gid, photos):
        members[g].add(p)
    stereo = set(photoset.STEREO_PAIR)
    merges = [sorted(m) for m in members.values() if len(m - stereo) + (1 if m & stereo else 0) > 1]
    all_hits = [h for v in hits.values() for h in v]
    return {
        "recall": float(np.mean(all_hits)),
        "recall_by_family": {k: float(np.mean(v)) for k, v in fam_hits.items()},
        "recall_by_edit": {k: float(np.mean(v)) for k, v in hits.items()},
        "merges_between_photos": len(merges),
        "merged_groups": merges,
        "stereo_pair_grouped": gid[orig["motorcycle_left"]] == gid[orig["motorcycle_right"]],
        "signals": dict(collections.Counter(s for s in signal if s)),
    }


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--json", action="store_true", help="print one JSON line")
    ap.add_argument("--large", action="store_true", help="upscale originals 3x so JPEG draft decoding is exercised")
    ap.add_argument("--seed", type=int, default=0, help="seed of the random crops and stamp corners")
    ap.add_argument("--radius", type=int, default=None, help="neardup radius (default: NeardupConfig's)")
    ap.add_argument("--semantic", action="store_true", help="also embed with the demo model and group semantically")
    args = ap.parse_args(argv)

    t0 = time.perf_counter()
    corpus = build_corpus(args.large, args.seed)
    hcfg = hashes_mod.HashesConfig()
    ncfg = neardup.NeardupConfig()
    if args.radius is not None:
        ncfg = dataclasses.replace(ncfg, radius=args.radius)
    plain = hashes_mod.HashesConfig(scales=[1.0], side_scale=0.0, corner_mask=0.0, work_size=0)
    t_hash = time.perf_counter()
    for r in corpus:
        r["codes"] = hashes_mod.hash_columns(r["image"], hcfg)[hashes_mod.codes_column(hcfg)]
    hash_s = time.perf_counter() - t_hash
    codes = np.array([r["codes"] for r in corpus], dtype=np.uint64)
    plain_codes = np.array([hashes_mod.hash_columns(r["image"], plain)[hashes_mod.codes_column(plain)] for r in corpus],
                           dtype=np.uint64)
    emb = embed_demo(corpus) if args.semantic else None
    ncfg_hash = dataclasses.replace(ncfg, semantic=False)
    result = {
        "photos": len(photoset.PHOTOS) + len(photoset.STEREO_PAIR),
        "files": len(corpus),
        "radius": ncfg.radius,
        "hash_ms_per_image": round(hash_s / len(corpus) * 1e3, 2),
        "default": {**grouping(corpus, neardup_table(corpus, hcfg, None), hcfg, ncfg_hash), **distances(corpus, codes, ncfg.radius)},
        "plain_phash": {**grouping(corpus, neardup_table([{**r, "codes": [int(c) for c in pc]} for r, pc in zip(corpus, plain_codes)],
                                                          plain, None), plain, ncfg_hash),
                        **distances(corpus, plain_codes, ncfg.radius)},
    }
    if emb is not None:
        photos = np.array([r["photo"] for r in corpus])
        sims = emb @ emb.T
        diff = photos[:, None] != photos[None, :]
        orig = {r["photo"]: i for i, r in enumerate(corpus) if r["family"] == "original"}
        copy_cos = [float(sims[i, orig[r["photo"]]]) for i, r in enumerate(corpus) if r["family"] != "original"]
        result["semantic_demo_model"] = {
            "cosine": ncfg.cosine,
            "distinct_max_cosine": float(np.where(diff, sims, -1).max()),
            "copy_min_cosine": min(copy_cos),
            **grouping(corpus, neardup_table(corpus, hcfg, emb), hcfg, ncfg),
        }
    result["seconds"] = round(time.perf_counter() - t0, 1)
    if args.json:
        print(json.dumps(result))
        return 0
    d, p = result["default"], result["plain_phash"]
    print(f"{result['photos']} public photos, {result['files']} files, radius {ncfg.radius} bits"
          f"{' (originals upscaled 3x: draft decoding)' if args.large else ''}")
    print(f"{'edit':16s} {'recall':>7s} {'max dist':>9s} | {'plain pHash recall':>18s} {'max dist':>9s}")
    for e in d["recall_by_edit"]:
        print(f"{e:16s} {d['recall_by_edit'][e]:7.3f} {d['copy_max_by_edit'][e]:9d} | "
              f"{p['recall_by_edit'][e]:18.3f} {p['copy_max_by_edit'][e]:9d}")
    print("recall by family: " + ", ".join(f"{k} {v:.3f}" for k, v in d["recall_by_family"].items()))
    print(f"copies within the radius of their original directly: {d['pair_recall']:.3f} (plain pHash {p['pair_recall']:.3f})")
    print(f"overall recall {d['recall']:.3f} (plain pHash {p['recall']:.3f}); "
          f"merges between different photos: {d['merges_between_photos']} (plain {p['merges_between_photos']})")
    print(f"largest copy distance {d['copy_max']} bits; closest different photos {d['distinct_min']} bits "
          f"({' ~ '.join(d['distinct_min_pair'])}); plain pHash: {p['copy_max']} vs {p['distinct_min']}")
    print(f"stereo pair (two cameras, one scene): {d['stereo_pair_distance']} bits, grouped: {d['stereo_pair_grouped']}")
    if "semantic_demo_model" in result:
        s = result["semantic_demo_model"]
        print(f"demo-model embeddings: distinct photos up to cosine {s['distinct_max_cosine']:.4f}, copies down to "
              f"{s['copy_min_cosine']:.4f}; with semantic links at >= {s['cosine']}: recall {s['recall']:.3f}, "
              f"merges {s['merges_between_photos']}, signals {s['signals']}")
    print(f"hashing {result['hash_ms_per_image']} ms/image; total {result['seconds']} s")
    return 0


if __name__ == "__main__":
    sys.exit(main())
