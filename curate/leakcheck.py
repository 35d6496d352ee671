"""leakcheck: prove two image sets share no near-duplicate (or find the pairs that leak).

A and B may each be a folder, a manifest, a tar set, a shard set or a curate output
(curate.imagesets). Every image gets the pipeline's multi-view perceptual codes (crops, and the
mirror or turns the settings ask for); the search is exact (multi-index Hamming range search,
curate.similarity.cross_set_pairs, equal to brute force), so "no pairs" means no pair within the
radius exists, not that none was found by sampling. Each pair names the transform that matched.
With a semantic cosine threshold and a CLIP model, pairs of near-identical embeddings are
reported as well, encoded as the embed stage encodes (curate.stages.embed.load) on the config's
inference path; see `_embed_view` for what `auto` and int8 calibrate on outside a run.
"""
from __future__ import annotations

import base64
import html as html_mod
import io
import time
from pathlib import Path
from typing import Any

import numpy as np

from . import imagesets, similarity
from .errors import ConfigError, InputError

# Pairs drawn in the HTML page (the JSON and the return value always hold every pair).
HTML_MAX_PAIRS = 500
# Thumbnail long side in the HTML page, pixels.
THUMB = 160


def default_radius() -> int:
    """The neardup stage's default radius, so leakcheck and the pipeline agree out of the box."""
    from .stages.neardup import NeardupConfig

    return int(NeardupConfig().radius)


def leakcheck(a: str | Path, b: str | Path, *, radius: int | None = None, semantic: float = 0.0,
              model: str = "", pretrained: str = "", config: str | Path | None = None,
              html: str | Path | None = None, cache_dir: str | Path | None = None,
              workers: int = 1) -> dict[str, Any]:
    """Every near-duplicate pair (one image of `a`, one of `b`), with distances.

    radius: Hamming bits (of 64) within which two images match; None = neardup's default.
    semantic: cosine threshold for embedding matches (0 = off; needs `model`).
    config: a pipeline TOML whose [inspect]/[hashes] settings to use (default: built-in), so the
        codes match a run made with it.
    html: write a page with thumbnails of each pair side by side.
    cache_dir: keep each set's codes there (keyed by path + size + mtime and settings).
    """
    t0 = time.perf_counter()
    if semantic and not model and config is None:
        raise ConfigError("semantic matching needs a CLIP model (--model, e.g. demo) or a --config", key="model")
    if not 0.0 <= float(semantic) <= 1.0:
        raise ConfigError(f"semantic must be a cosine in [0, 1] (0 = off), got {semantic}", key="semantic")
    cfg = _config(config)
    settings = imagesets.default_settings(cfg)
    if radius is None and cfg is not None and "neardup" in cfg.names():
        radius = cfg.neardup.radius
    r = default_radius() if radius is None else int(radius)
    if not 0 <= r <= 64:
        raise ConfigError(f"radius must be 0..64 bits, got {r}", key="radius")
    cache = str(cache_dir) if cache_dir else None
    timings: dict[str, float] = {}
    max_bytes = cfg.input.max_file_bytes if cfg is not None else None
    sets, codes = _hash_sets(a, b, settings, cache, workers, timings, max_bytes)
    t = time.perf_counter()
    check_r = getattr(getattr(cfg, "neardup", None), "check_radius", similarity.CHECK_RADIUS)
    pairs = cross_set_pairs(codes[0], codes[1], r, int(check_r))
    timings["search"] = time.perf_counter() - t
    notes: list[str] = []
    path = None
    if semantic:
        from .stages.embed import inference_path, load

        t = time.perf_counter()
        view = _embed_view(cfg, model, pretrained, notes)
        lm = load(view)  # set_embeddings encodes with this same model
        if "fallback" in lm.choice:
            notes.append(f"embed backend/precision auto fell back to torch fp32: {lm.choice['fallback']}")
        path = inference_path(lm)
        pairs += _semantic_pairs(sets, view, float(semantic), cache, pairs)
        timings["semantic"] = time.perf_counter() - t
    pairs.sort(key=lambda p: (p["signal"] != "phash", p["distance"], p["a"], p["b"]))
    out = {
        "pairs": pairs,
        "a": sets[0].root,
        "b": sets[1].root,
        "a_count": len(sets[0]),
        "b_count": len(sets[1]),
        "a_unreadable": _unreadable(codes[0]),
        "b_unreadable": _unreadable(codes[1]),
        "hashed": codes[0].computed + codes[1].computed,
        "radius": r,
        "semantic": float(semantic),
        "semantic_path": path,
        "notes": notes,
        "timings": {k: round(v, 4) for k, v in timings.items()},
    }
    if html:
        t = time.perf_counter()
        write_html(html, out, sets)
        timings["html"] = time.perf_counter() - t
    out["seconds"] = round(time.perf_counter() - t0, 4)
    return out


def _hash_sets(a: str | Path, b: str | Path, settings: Any, cache: str | None, workers: int,
               timings: dict[str, float], max_bytes: int | None) -> tuple[list[imagesets.ImageSet], list[imagesets.SetCodes]]:
    """List and hash both sets (codes cached in `cache`), timing each step into `timings`."""
    sets, codes = [], []
    for which, path in (("a", a), ("b", b)):
        t = time.perf_counter()
        s = imagesets.list_set(path, max_bytes)
        if len(s) == 0:
            raise InputError(f"set {which.upper()} ({path}) holds no images; nothing to compare")
        timings[f"list_{which}"] = time.perf_counter() - t
        t = time.perf_counter()
        codes.append(imagesets.set_codes(s, settings, cache_dir=cache, workers=workers))
        timings[f"hash_{which}"] = time.perf_counter() - t
        sets.append(s)
    return sets, codes


def _config(config: str | Path | None) -> Any:
    if config is None:
        return None
    from .config import load_config
    from .plan import config_sections

    return load_config(config, (), config_sections())


def _embed_view(cfg: Any, model: str, pretrained: str, notes: list[str]) -> Any:
    """The config's [embed] and [input] sections (built-in defaults without a config), `model`/`pretrained`
    taking precedence when given, as the view curate.stages.embed.load reads.

    The inference path is the config's [embed] backend and precision. `auto` and int8 calibrate as a run
    does, on the first images of the config's [input] path, so with the run's own config the embeddings
    are the run's (same calibration batch: the same pick and the same int8 scales). Without an input
    path there is nothing to calibrate on: `auto` uses torch fp32, the reference, and says so in `notes`;
    int8 is refused."""
    import dataclasses

    from .config import InputConfig, PipelineConfig
    from .stages.base import ConfigView
    from .stages.embed import LOAD_SECTIONS, EmbedConfig

    have = cfg.names() if cfg is not None else []
    ecfg = cfg.embed if "embed" in have else EmbedConfig()
    if model:
        ecfg = dataclasses.replace(ecfg, model=model, pretrained=pretrained)
    inp = cfg.input if "input" in have else InputConfig()
    auto = "auto" in (ecfg.backend, ecfg.precision)
    if (auto or ecfg.precision == "int8") and not inp.path:
        if not auto:
            raise ConfigError("embed.precision = 'int8' fits its scales on the first images of a run's input: "
                              "give --config with the run's [input] path, or set embed.precision = 'fp32'",
                              key="embed.precision")
        notes.append("embed backend/precision auto calibrates on a run's input, and no [input] path was given "
                     "(--config): semantic matching used torch fp32, the reference")
        ecfg = dataclasses.replace(ecfg, backend="torch", precision="fp32")
    sections = PipelineConfig({"embed": ecfg, "input": inp}, origin=getattr(cfg, "origin", None))
    return ConfigView(sections, LOAD_SECTIONS, "leakcheck")


def _unreadable(sc: imagesets.SetCodes) -> list[dict]:
    return [{"name": sc.images.names[i], "reason": sc.problems[i] or "decode_error"}
            for i in np.nonzero(~sc.ok)[0].tolist()]


def cross_set_pairs(a: imagesets.SetCodes, b: imagesets.SetCodes, radius: int,
                    check_radius: int = similarity.CHECK_RADIUS) -> list[dict]:
    """Exact cross-set search over the images that hashed; distance = closest allowed view pair
    (whose check codes pass, where the codes have them), `transform` = what takes the picture in A
    to the one in B ("identity", "mirror", "rot90", ...)."""
    p = similarity.cross_set_pairs(a.main, b.main, radius, a.identity, a.ok, b.ok, a.checks, b.checks, check_radius)
    out = []
    for i, j, d, va, vb in zip(*(np.asarray(x).tolist() for x in p)):
        transform = similarity.matched_transform(a.views, va, vb) if a.views is not None else "identity"
        out.append({"a": a.images.names[i], "b": b.images.names[j], "distance": int(d), "transform": transform,
                    "signal": "phash", "a_path": a.images.refs[i], "b_path": b.images.refs[j]})
    return out


def _semantic_pairs(sets: list, view: Any, threshold: float, cache: str | None,
                    seen: list[dict]) -> list[dict]:
    ea, eb = (imagesets.set_embeddings(s, view, cache_dir=cache) for s in sets)
    ra, rb = np.nonzero(ea.ok)[0], np.nonzero(eb.ok)[0]
    if not ra.size or not rb.size:
        return []
    ii, jj, ss = similarity.cross_cosine(ea.emb[ra], eb.emb[rb], threshold)
    have = {(p["a_path"], p["b_path"]) for p in seen}
    out = []
    for i, j, s in zip(ii.tolist(), jj.tolist(), ss.tolist()):
        ia, jb = int(ra[i]), int(rb[j])
        key = (sets[0].refs[ia], sets[1].refs[jb])
        if key in have:
            continue
        out.append({"a": sets[0].names[ia], "b": sets[1].names[jb], "distance": round(1.0 - float(s), 6),
                    "cosine": round(float(s), 6), "transform": None, "signal": "semantic", "a_path": key[0],
                    "b_path": key[1]})
    return out


# --------------------------------------------------------------------------- HTML


def _thumb(data: bytes | Exception) -> str:
    """A small JPEG as a data: URI, or '' when the image does not decode."""
    from PIL import Image, ImageOps

    from .stages.inspect import to_rgb

    if isinstance(data, Exception):
        return ""
    try:
        with Image.open(io.BytesIO(data)) as im:
            im.draft("RGB", (THUMB * 2, THUMB * 2))
            rgb = to_rgb(ImageOps.exif_transpose(im))
            rgb.thumbnail((THUMB, THUMB))
            buf = io.BytesIO()
            rgb.save(buf, "JPEG", quality=80)
    except Exception:  # noqa: BLE001 - a thumbnail is a courtesy; the pair is listed anyway
        return ""
    return "data:image/jpeg;base64," + base64.b64encode(buf.getvalue()).decode("ascii")


def _thumbs(images: imagesets.ImageSet, refs: list[str]) -> dict[str, str]:
    index = {r: i for i, r in enumerate(images.refs)}
    idx = sorted({index[r] for r in refs if r in index})
    return {images.refs[i]: _thumb(d) for i, d in zip(idx, images.read(idx))}


def write_html(path: str | Path, result: dict, sets: list[imagesets.ImageSet]) -> None:
    """A self-contained page: one row per pair, thumbnails side by side, names escaped."""
    from .workdir import write_bytes

    esc = html_mod.escape
    shown = result["pairs"][:HTML_MAX_PAIRS]
    ta = _thumbs(sets[0], [p["a_path"] for p in shown])
    tb = _thumbs(sets[1], [p["b_path"] for p in shown])
    n = len(result["pairs"])
    head = (f"{n} near-duplicate pair(s) between A and B within {result['radius']} bits"
            + (f" or cosine >= {result['semantic']}" if result["semantic"] else ""))
    rows = []
    for p in shown:
        dist = f"cosine {p['cosine']}" if p["signal"] == "semantic" else f"{p['distance']} bits"
        if p.get("transform") not in (None, "identity"):
            dist += f" ({p['transform']})"
        cells = []
        for side, thumbs in (("a", ta), ("b", tb)):
            src = thumbs.get(p[f"{side}_path"], "")
            img = f'<img src="{src}" alt="">' if src else "<span>(no preview)</span>"
            cells.append(f"<td>{img}<div>{esc(p[side])}</div></td>")
        rows.append(f"<tr>{cells[0]}<td class=d>{esc(dist)}</td>{cells[1]}</tr>")
    more = f"<p>{n - len(shown)} more pair(s) not drawn; see --json.</p>" if n > len(shown) else ""
    page = f"""<!doctype html>
<html lang="en"><head><meta charset="utf-8"><title>curate leakcheck</title>
<style>body{{font-family:sans-serif;margin:1.5em}}td{{vertical-align:top;padding:.4em;border-bottom:1px solid #ddd}}
td div{{font-size:.8em;max-width:{THUMB * 2}px;word-break:break-all}}.d{{text-align:center;white-space:nowrap}}</style>
</head><body>
<h1>leakcheck</h1>
<p>A: {esc(result['a'])} ({result['a_count']} images)<br>B: {esc(result['b'])} ({result['b_count']} images)</p>
<p><b>{esc(head)}</b></p>
<table><tr><th>A</th><th>distance</th><th>B</th></tr>
{chr(10).join(rows)}
</table>{more}
</body></html>
"""
    write_bytes(path, page.encode("utf-8"))
