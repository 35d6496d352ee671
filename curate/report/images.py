"""Thumbnails for the report and the review sheet, and the loaders that read sample bytes back.

A loader maps sample_ids to image bytes (None where unreadable). Bytes are read through the
source locators the run recorded (`work/source/*.parquet`, or the joined table during a run),
and, for kept samples whose input has moved, from the training shards' `image` column.
Thumbnails are small JPEGs; an image that does not decode simply has none.
"""
from __future__ import annotations

import io
from pathlib import Path
from typing import Callable, Iterable

import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

THUMB = 144  # longest side of a thumbnail in pixels (common practice for contact sheets: ~1-2 inches)
QUALITY = 70  # JPEG quality of thumbnails: small files, faces and text still recognisable (common practice)
# Decoding more pixels than this for one thumbnail is refused (Pillow's own bomb limit is about 89.5 M
# pixels, PIL.Image.MAX_IMAGE_PIXELS; we stay at that default of [inspect] max_pixels).
MAX_SOURCE_PIXELS = 89_478_485

Loader = Callable[[list[str]], list["bytes | None"]]


def thumbnail(data: bytes | None) -> bytes | None:
    """A JPEG of at most THUMB x THUMB pixels, upright, alpha on white; None when it does not decode."""
    if not data:
        return None
    import warnings

    from PIL import Image, ImageOps

    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", Image.DecompressionBombWarning)  # we refuse large images below
            with Image.open(io.BytesIO(data)) as im:
                w, h = im.size
                if w * h > MAX_SOURCE_PIXELS or w < 1 or h < 1:
                    return None
                im.draft("RGB", (THUMB * 2, THUMB * 2))  # JPEG: decode at a reduced scale (no-op elsewhere)
                img = ImageOps.exif_transpose(im)
                if img.mode in ("RGBA", "LA", "PA") or (img.mode == "P" and "transparency" in img.info):
                    rgba = img.convert("RGBA")
                    img = Image.alpha_composite(Image.new("RGBA", rgba.size, (255, 255, 255, 255)), rgba)
                rgb = img.convert("RGB")
                rgb.thumbnail((THUMB, THUMB))
                buf = io.BytesIO()
                rgb.save(buf, "JPEG", quality=QUALITY)
                return buf.getvalue()
    except Exception:  # noqa: BLE001 - any image a decoder rejects just has no thumbnail
        return None


def _pick(table: pa.Table, ids: list[str], value: str) -> dict[str, str]:
    """sample_id -> `value` column for the wanted ids; one vectorised filter, no loop per row."""
    if not ids or table.num_rows == 0:
        return {}
    hit = table.filter(pc.is_in(table.column("sample_id"), value_set=pa.array(sorted(set(ids)), pa.string())))
    return dict(zip(hit.column("sample_id").to_pylist(), hit.column(value).to_pylist()))


def locator_loader(table: pa.Table, max_bytes: int | None = None, fallback: Loader | None = None) -> Loader:
    """A loader over a table with `sample_id` and `locator` columns (the run's source table)."""

    def load(ids: list[str]) -> list[bytes | None]:
        from ..sources import read_bytes

        locs = _pick(table, ids, "locator")
        wanted = [i for i in ids if locs.get(i)]
        got = dict(zip(wanted, read_bytes([locs[i] for i in wanted], max_bytes=max_bytes)))
        out = [got.get(i) if isinstance(got.get(i), bytes) else None for i in ids]
        missing = [i for i, b in zip(ids, out) if b is None]
        if fallback is not None and missing:
            more = dict(zip(missing, fallback(missing)))
            out = [b if b is not None else more.get(i) for i, b in zip(ids, out)]
        return out

    return load


def shard_loader(out_dir: str | Path) -> Loader:
    """A loader over the training shards' `image` column (kept samples only)."""
    parts = sorted((Path(out_dir) / "shards").glob("*/part-*.parquet"))

    def load(ids: list[str]) -> list[bytes | None]:
        found: dict[str, bytes] = {}
        want = pa.array(sorted(set(ids)), pa.string())
        for p in parts:
            try:
                t = pq.read_table(p, columns=["sample_id", "image"],
                                  filters=pc.is_in(pc.field("sample_id"), value_set=want))
            except (OSError, pa.ArrowException, KeyError):
                continue
            found.update(zip(t.column("sample_id").to_pylist(), t.column("image").to_pylist()))
        return [found.get(i) for i in ids]

    return load


def output_loader(out_dir: str | Path, max_bytes: int | None = None) -> Loader:
    """A loader for a finished run's output folder: source locators first, then the shards."""
    files = sorted((Path(out_dir) / "work" / "source").glob("*.parquet"))
    tables = []
    for p in files:
        try:
            tables.append(pq.read_table(p, columns=["sample_id", "locator"]).replace_schema_metadata(None))
        except (OSError, pa.ArrowException, KeyError):
            continue
    table = pa.concat_tables(tables) if tables else pa.table({"sample_id": pa.array([], pa.string()),
                                                              "locator": pa.array([], pa.string())})
    return locator_loader(table, max_bytes, fallback=shard_loader(out_dir))


def thumbnails(load: Loader | None, ids: Iterable[str]) -> tuple[dict[str, bytes], str]:
    """sample_id -> thumbnail JPEG for those that load and decode (one loader call for all), and a
    note saying why there are none when the loader itself failed."""
    ids = sorted(set(ids))
    if load is None or not ids:
        return {}, ""
    try:
        data = load(ids)
    except Exception as e:  # noqa: BLE001 - pictures are a courtesy: the page is written without them
        return {}, f"the images could not be read back ({type(e).__name__}: {e})"
    out = {}
    for sid, raw in zip(ids, data):
        t = thumbnail(raw)
        if t is not None:
            out[sid] = t
    return out, ""
