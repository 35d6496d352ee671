"""Near-duplicate quality on public photos: recall per edit, mirror, turn and crop level; merges.

Every photo of bench/photoset.py (scikit-image, scikit-learn and matplotlib sample photos) is stored
as a JPEG original plus one file per edit: the everyday edits (JPEG quality, rescale, blur,
brightness, contrast, format, border crops up to 8% per side, corner stamps) and the hard ones
(mirror image, quarter and half turns, crops of 10/20/30% from one side or centred, and each turn
combined with each crop). Every file is decoded the way the inspect stage decodes, hashed with
curate.similarity.image_codes and grouped with curate.similarity.group (leader groups, keeper =
most pixels, then the lower name). Reported for several code settings:
- recall: share of copies in their original's group, per edit and per turn x crop level;
- merges: groups holding files of two different photos (target: zero);
- the largest distance of a member to its group's kept sample (at most the radius by construction),
  next to what union-find components (groups that chain) would give;
- the closest pair of views of two different photos, with and without the check codes.
With --semantic the demo CLIP model (trained on pottery photos only) adds embedding links.

    .venv/bin/python bench/neardup_quality.py [--json] [--large] [--semantic]
"""
from __future__ import annotations

import argparse
import collections
import hashlib
import json
import sys
import time
from pathlib import Path
from typing import Any

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "bench"))

from curate import similarity  # noqa: E402
from curate.similarity import codes as codes_mod  # noqa: E402

import photoset  # noqa: E402

RADIUS = 8  # neardup's default radius (bits of 64)
CHECK_RADIUS = similarity.CHECK_RADIUS  # the default; --check-radius measures others
COSINE = 0.99  # neardup's default embedding cosine
SETTINGS = {
    "default": similarity.CodeSettings(),
    "default_whole": similarity.CodeSettings(transform_boxes="whole"),
    "turns": similarity.CodeSettings(transforms=["mirror", "rot90", "rot180", "rot270"]),
    "turns_whole": similarity.CodeSettings(transforms=["mirror", "rot90", "rot180", "rot270"], transform_boxes="whole"),
    "turns_no_check": similarity.CodeSettings(transforms=["mirror", "rot90", "rot180", "rot270"], check=""),
    "plain_phash": similarity.CodeSettings(scales=[1.0], side_scale=0.0, corner_mask=0.0, transforms=[], check="",
                                           work_size=0),
}


def build_corpus(large: bool, seed: int) -> list[dict]:
    """One record per file: photo, family, edit, bytes, decoded RGB image."""
    from PIL import Image

    out = []
    for name in list(photoset.PHOTOS) + list(photoset.STEREO_PAIR):
        img = photoset.load_photo(name)
        if large:  # big enough that inspect decodes the JPEG original in draft mode
            img = img.resize((img.width * 3, img.height * 3), Image.Resampling.BICUBIC)
        files = [("original", "original", photoset.original_bytes(img))]
        if name in photoset.PHOTOS:
            files += photoset.variants(name, img, seed) + photoset.hard_variants(name, img, seed)
        for fam, edit, data in files:
            out.append({"photo": name, "family": fam, "edit": edit, "bytes": data,
                        "image": photoset.decode_like_inspect(data)})
    return out


def encode(corpus: list[dict], s: similarity.CodeSettings) -> tuple[np.ndarray, np.ndarray | None, float]:
    """(main codes, check codes or None, ms per image)."""
    t = time.perf_counter()
    c = np.array([similarity.image_codes(r["image"], s) for r in corpus], dtype=np.uint64)
    ms = (time.perf_counter() - t) / len(corpus) * 1e3
    main, check = codes_mod.split_codes(c, s)
    return main, check, ms


def keeper_rank(corpus: list[dict]) -> np.ndarray:
    """Most pixels first, then the lower name (the neardup stage's rule without other checks)."""
    px = np.array([r["image"].width * r["image"].height for r in corpus])
    names = np.array([f"{r['photo']}/{r['edit']}" for r in corpus])
    order = np.lexsort((names, -px))
    rank = np.empty(len(corpus), np.int64)
    rank[order] = np.arange(len(corpus))
    return rank


def _stereo_one(photos: set) -> int:
    """Distinct pictures in a set of photo names, the stereo pair counted as one scene."""
    return len(photos - set(photoset.STEREO_PAIR)) + (1 if photos & set(photoset.STEREO_PAIR) else 0)


def evaluate(corpus: list[dict], s: similarity.CodeSettings, main: np.ndarray, check: np.ndarray | None,
             emb: np.ndarray | None = None) -> dict:
    """Leader groups of the corpus and what they found."""
    ident = similarity.identity_count(s)
    cr = CHECK_RADIUS if check is not None else 64
    sha = np.unique([hashlib.sha256(r["bytes"]).hexdigest() for r in corpus], return_inverse=True)[1]
    emb_pairs = similarity.cosine_pairs(emb, COSINE) if emb is not None else None
    sig = similarity.Signals(same_key=sha, codes=main, identity=ident, radius=RADIUS, checks=check, check_radius=cr,
                             emb_pairs=emb_pairs, emb=emb)
    g = similarity.group(keeper_rank(corpus), sig)
    orig = {r["photo"]: i for i, r in enumerate(corpus) if r["family"] == "original"}
    hits: dict[str, list[bool]] = collections.defaultdict(list)
    for i, r in enumerate(corpus):
        if r["family"] != "original":
            hits[r["edit"]].append(bool(g.leader[i] == g.leader[orig[r["photo"]]]))
    members: dict[int, set] = collections.defaultdict(set)
    for i, r in enumerate(corpus):
        members[int(g.leader[i])].add(r["photo"])
    merges = [sorted(m) for m in members.values() if _stereo_one(m) > 1]
    is_member = g.leader != np.arange(len(corpus))
    by_codes = is_member & (g.signal == similarity.groups.CODES)
    by_emb = is_member & (g.signal == similarity.groups.EMBEDDING)
    transforms = collections.Counter(t for t, m in zip(g.transforms(similarity.views(s)), by_codes) if m)
    return {
        "recall_by_edit": {k: float(np.mean(v)) for k, v in hits.items()},
        "merges_between_photos": len(merges),
        "merged_groups": merges,
        "max_member_to_kept_bits": int(g.distance[by_codes].max(initial=0)),
        "max_member_to_kept_1_minus_cosine": round(float(g.distance[by_emb].max(initial=0.0)), 5),
        "matched_transforms": dict(transforms),
        "signals": dict(collections.Counter(similarity.SIGNALS[x] for x in g.signal if x >= 0)),
        "union_find": union_find(corpus, s, main, check, sha, emb_pairs),
        "closest_distinct": closest_distinct(corpus, s, main, check),
        "check_margin": check_margin(corpus, s, main, check),
    }


def check_margin(corpus: list[dict], s: similarity.CodeSettings, main: np.ndarray, check: np.ndarray | None) -> dict:
    """For pairs of files whose main codes match (some view pair within the radius): the closest
    check codes among those view pairs, the largest over an original and its copy, and the smallest
    over different photos. The check radius must sit between them."""
    if check is None:
        return {}
    ident = similarity.identity_count(s)
    photos = np.array([r["photo"] for r in corpus])
    p = similarity.sample_pairs(main, RADIUS, ident)
    # Swapped roles: the check codes' distance over view pairs whose main codes are within the radius.
    d = similarity.min_distances(check[p.i], check[p.j], ident, main[p.i], main[p.j], RADIUS)
    edits = np.array([r["edit"] for r in corpus])
    same = (photos[p.i] == photos[p.j]) & ((edits[p.i] == "original") | (edits[p.j] == "original"))
    stereo = np.isin(photos[p.i], list(photoset.STEREO_PAIR)) & np.isin(photos[p.j], list(photoset.STEREO_PAIR))
    name = (lambda k: [f"{corpus[p.i[k]]['photo']}/{corpus[p.i[k]]['edit']}",  # noqa: E731
                       f"{corpus[p.j[k]]['photo']}/{corpus[p.j[k]]['edit']}"])
    out: dict[str, Any] = {}
    if same.any():
        k = np.flatnonzero(same)[np.argmax(d[same])]
        out.update(copies_max_bits=int(d[k]), copies_max_pair=name(k))
    diff = (photos[p.i] != photos[p.j]) & ~stereo
    if diff.any():
        k = np.flatnonzero(diff)[np.argmin(d[diff])]
        out.update(distinct_min_bits=int(d[k]), distinct_min_pair=name(k), distinct_pairs=int(diff.sum()))
    return out


def union_find(corpus: list[dict], s: similarity.CodeSettings, main: np.ndarray, check: np.ndarray | None,
               sha: np.ndarray, emb_pairs: Any) -> dict:
    """Groups that chain (connected components of the same links), for comparison."""
    ident = similarity.identity_count(s)
    cr = CHECK_RADIUS if check is not None else 64
    p = similarity.sample_pairs(main, RADIUS, ident, check, cr)
    ii, jj = [p.i], [p.j]
    first = np.unique(sha, return_index=True)[1]
    ii.append(np.arange(len(corpus)))
    jj.append(first[sha])
    if emb_pairs is not None:
        ii.append(emb_pairs.i)
        jj.append(emb_pairs.j)
    lab = similarity.components(len(corpus), np.concatenate(ii), np.concatenate(jj))
    rank = keeper_rank(corpus)
    best: dict[int, int] = {}
    for i in np.argsort(rank).tolist():
        best.setdefault(int(lab[i]), i)
    keep = np.array([best[int(x)] for x in lab])
    d = similarity.min_distances(main[keep], main, ident, None if check is None else check[keep], check, cr)
    photos = collections.defaultdict(set)
    for i, r in enumerate(corpus):
        photos[int(lab[i])].add(r["photo"])
    return {"merges_between_photos": sum(_stereo_one(m) > 1 for m in photos.values()),
            "max_member_to_kept_bits": int(d[keep != np.arange(len(corpus))].max(initial=0)),
            "members_not_linked_to_kept": int(((d > RADIUS) & (keep != np.arange(len(corpus)))).sum())}


def closest_distinct(corpus: list[dict], s: similarity.CodeSettings, main: np.ndarray, check: np.ndarray | None) -> dict:
    """The closest pair of files of two different photos (stereo pair apart), within 16 bits."""
    ident = similarity.identity_count(s)
    photos = np.array([r["photo"] for r in corpus])
    stereo = np.isin(photos, list(photoset.STEREO_PAIR))
    out = {}
    for key, chk in (("with_check", check), ("without_check", None)):
        if key == "with_check" and check is None:
            continue
        p = similarity.sample_pairs(main, 16, ident, chk, CHECK_RADIUS if chk is not None else 64)
        diff = (photos[p.i] != photos[p.j]) & ~(stereo[p.i] & stereo[p.j])
        if not diff.any():
            out[key] = {"bits": None}
            continue
        k = np.flatnonzero(diff)[np.argmin(p.distance[diff])]
        out[key] = {"bits": int(p.distance[k]), "pair": [f"{corpus[p.i[k]]['photo']}/{corpus[p.i[k]]['edit']}",
                                                         f"{corpus[p.j[k]]['photo']}/{corpus[p.j[k]]['edit']}"]}
    return out


def embed_demo(corpus: list[dict]) -> np.ndarray:
    """Image embeddings from the demo CLIP model (curate.models), L2-normalised."""
    import torch

    from curate.models.clip import load_model

    lm = load_model("demo", "", device="cpu")
    steps = lm.pil_steps()
    out = []
    for r in corpus:
        img = r["image"]
        for st in steps:
            img = st(img)
        arr = np.array(img.convert("RGB"))
        out.append(lm.encode_images(torch.from_numpy(arr[None]))[0])
    e = np.asarray(out, dtype=np.float32)
    return e / np.linalg.norm(e, axis=1, keepdims=True)


def turn_crop_table(recall: dict[str, float]) -> dict[str, dict[str, float | None]]:
    """Recall per turn (rows) and crop level (columns)."""
    return {t: {c: recall.get(photoset.hard_edit_name(t, c)) for c in photoset.HARD_CROPS} for t in photoset.HARD_TURNS}


def _print_table(title: str, table: dict[str, dict[str, float | None]]) -> None:
    crops = list(photoset.HARD_CROPS)
    print(f"{title}\n  {'':9s}" + "".join(f"{c.replace('crop_', ''):>11s}" for c in crops))
    for t, row in table.items():
        print(f"  {t:9s}" + "".join(f"{'-' if row[c] is None else f'{row[c]:.3f}':>11s}" for c in crops))


def main(argv: list[str] | None = None) -> int:
    global CHECK_RADIUS
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--json", action="store_true", help="print one JSON line")
    ap.add_argument("--large", action="store_true", help="upscale originals 3x so JPEG draft decoding is exercised")
    ap.add_argument("--seed", type=int, default=0, help="seed of the random crops and stamp corners")
    ap.add_argument("--semantic", action="store_true", help="also link by demo-model embeddings (cosine >= 0.99)")
    ap.add_argument("--settings", nargs="+", choices=list(SETTINGS), default=list(SETTINGS), help="code settings to run")
    ap.add_argument("--check-radius", type=int, nargs="+", default=[CHECK_RADIUS],
                    help="check radii to group with (each gives its own results)")
    args = ap.parse_args(argv)

    t0 = time.perf_counter()
    corpus = build_corpus(args.large, args.seed)
    result: dict[str, Any] = {"photos": len(photoset.PHOTOS), "files": len(corpus), "radius": RADIUS,
                              "check_radius": args.check_radius, "settings": {}}
    coded = {}
    for key in args.settings:
        s = SETTINGS[key]
        main_, check, ms = encode(corpus, s)
        coded[key] = (main_, check)
        for cr in args.check_radius if check is not None else [CHECK_RADIUS]:
            CHECK_RADIUS = cr
            r = evaluate(corpus, s, main_, check)
            r["codes_per_image"] = similarity.code_count(s)
            r["hash_ms_per_image"] = round(ms, 2)
            r["turn_x_crop_recall"] = turn_crop_table(r["recall_by_edit"])
            name = key if len(args.check_radius) == 1 or check is None else f"{key}@check{cr}"
            result["settings"][name] = r
    CHECK_RADIUS = args.check_radius[0]
    if args.semantic:
        emb = embed_demo(corpus)
        photos = np.array([r["photo"] for r in corpus])
        sims = emb @ emb.T
        orig = {r["photo"]: i for i, r in enumerate(corpus) if r["family"] == "original"}
        copy_cos: dict[str, list[float]] = collections.defaultdict(list)
        for i, r in enumerate(corpus):
            if r["family"] != "original":
                copy_cos[r["edit"]].append(float(sims[i, orig[r["photo"]]]))
        for key in [k for k in ("default", "turns") if k in coded]:
            r = evaluate(corpus, SETTINGS[key], *coded[key], emb=emb)
            r["turn_x_crop_recall"] = turn_crop_table(r["recall_by_edit"])
            result["settings"][f"{key}+demo_clip"] = r
        result["demo_clip"] = {
            "distinct_max_cosine": round(float(np.where(photos[:, None] != photos[None, :], sims, -1).max()), 4),
            "copy_min_cosine_by_edit": {k: round(min(v), 4) for k, v in copy_cos.items()},
        }
    result["seconds"] = round(time.perf_counter() - t0, 1)
    if args.json:
        print(json.dumps(result))
        return 0
    report(result)
    return 0


def report(result: dict) -> None:
    print(f"{result['photos']} public photos, {result['files']} files, radius {result['radius']} bits, "
          f"check radius {result['check_radius']} bits")
    for key, r in result["settings"].items():
        uf = r["union_find"]
        cd = r["closest_distinct"]
        print(f"\n== {key}: {r.get('codes_per_image', '')} codes/image, {r.get('hash_ms_per_image', '')} ms/image; "
              f"merges between photos {r['merges_between_photos']} (union-find: {uf['merges_between_photos']}); "
              f"largest member-to-kept distance {r['max_member_to_kept_bits']} bits"
              f" (union-find: {uf['max_member_to_kept_bits']}, {uf['members_not_linked_to_kept']} members not linked "
              f"to the kept sample); closest different photos: " + ", ".join(
                  f"{k} {v['bits']} bits {' ~ '.join(v.get('pair', []))}" for k, v in cd.items()))
        if r["merged_groups"]:
            print(f"  merged: {r['merged_groups']}")
        if r["check_margin"]:
            m = r["check_margin"]
            print(f"  check codes where main codes match: original-copy pairs up to {m.get('copies_max_bits')} bits "
                  f"({' ~ '.join(m.get('copies_max_pair', []))}); {m.get('distinct_pairs', 0)} pairs of different photos, "
                  f"closest {m.get('distinct_min_bits')} bits ({' ~ '.join(m.get('distinct_min_pair', []))})")
        print(f"  transforms matched: {r['matched_transforms']}; signals: {r['signals']}")
        everyday = [e for fam in photoset.TRANSFORMS.values() for e in fam]
        low = {e: round(r["recall_by_edit"][e], 3) for e in everyday if r["recall_by_edit"][e] < 1.0}
        print(f"  everyday edits: recall 1.000 on all but {low}" if low else "  everyday edits: recall 1.000 on all")
        _print_table("  recall per turn (rows) and crop (columns; one = one side, centre = half from each end):",
                     r["turn_x_crop_recall"])
    if "demo_clip" in result:
        d = result["demo_clip"]
        low = sorted(d["copy_min_cosine_by_edit"].items(), key=lambda kv: kv[1])[:6]
        print(f"\ndemo CLIP: different photos up to cosine {d['distinct_max_cosine']}; lowest copy cosines {low}")
    print(f"\ntotal {result['seconds']} s")


if __name__ == "__main__":
    sys.exit(main())
