"""Manifest input: a CSV, JSONL or Parquet table with one row per sample.

- Columns: `input.image_column` (path relative to the manifest's folder, or
  absolute), `input.caption_column`, optional `input.id_column`. A missing
  column is an InputError naming it and the columns that exist. Every other
  column goes into `meta` as a JSON object (bytes as base64, dates ISO 8601).
- `source` is the image path as written. Without an id column each image may
  be listed once (two rows for one path would share one id: an InputError
  that says to add an id column). With an id column, sample_id =
  stable_id(id text) and a repeated or empty id is an InputError.
- A row whose image file does not exist (or is not a readable regular file)
  gets `unreadable`; a row with no image path gets the source
  `(row N: no image path)` and `unreadable`.
- An empty or null caption cell -> null caption and `caption_missing`; a
  cell that is not text (a number, a list) -> `caption_unreadable`.
- CSV: comma separated, first row is the header, UTF-8 (a BOM is skipped);
  bytes that are not UTF-8 reach caption_raw unchanged. An empty CSV cell is
  null (CSV has no other way to write one). JSONL: one object per line,
  blank lines skipped; a line that is not a JSON object is an InputError
  naming its line number.
"""
from __future__ import annotations

import csv
import json
import os
import stat
from typing import Any, Iterator

from ..config import InputConfig
from ..errors import InputError
from .base import stable_id
from .common import clean_text, make_row, meta_json, raw_caption

MANIFEST_EXTENSIONS = (".csv", ".jsonl", ".parquet")

# CSV cells may hold long captions; the csv module's default cap is 128 KiB.
_CSV_FIELD_LIMIT = 1 << 24


def list_manifest(path: str, cfg: InputConfig) -> list[dict]:
    """One row per manifest row. `path` is the manifest's absolute path."""
    columns, records = _read(path)
    wanted = [cfg.image_column, cfg.caption_column] + ([cfg.id_column] if cfg.id_column else [])
    for col in wanted:
        if col not in columns:
            raise InputError(
                f"manifest {path}: no column {col!r}; its columns are: {', '.join(map(repr, columns)) or '(none)'}"
                " (set input.image_column / input.caption_column / input.id_column)"
            )
    extra = [c for c in columns if c not in wanted]
    base = os.path.dirname(path)
    rows: list[dict] = []
    first_row: dict[str, int] = {}
    for n, rec in records:
        image = _text(rec.get(cfg.image_column))
        if image is None:
            source, locator, problem = f"(row {n}: no image path)", "", "unreadable"
            size = mtime = None
        else:
            source, ok = clean_text(image)
            locator, _ = clean_text(os.path.join(base, image))
            problem, size, mtime = _stat(os.path.join(base, image))
            if not ok:
                problem = "unreadable"
        if cfg.id_column:
            ident = _text(rec.get(cfg.id_column))
            if ident is None:
                raise InputError(f"manifest {path}: row {n} has an empty id in column {cfg.id_column!r}")
            key = ident
            if key in first_row:
                raise InputError(
                    f"manifest {path}: id {ident!r} in column {cfg.id_column!r} appears twice "
                    f"(rows {first_row[key]} and {n}); ids must be unique"
                )
            sample_id = stable_id(ident)
        else:
            key = source
            if key in first_row:
                raise InputError(
                    f"manifest {path}: image {source!r} is listed twice (rows {first_row[key]} and {n}); "
                    "list each image once, or add a unique id column and set input.id_column"
                )
            sample_id = None
        first_row[key] = n
        caption, cproblem = _caption(rec.get(cfg.caption_column))
        rows.append(
            make_row(
                source,
                locator,
                sample_id=sample_id,
                caption_raw=caption,
                caption_problem=cproblem,
                source_problem=problem,
                file_size=size,
                mtime_ns=mtime,
                meta=meta_json({c: rec.get(c) for c in extra}) if extra else None,
            )
        )
    return rows


def _read(path: str) -> tuple[list[str], Iterator[tuple[int, dict[str, Any]]]]:
    ext = os.path.splitext(path)[1].lower()
    if ext == ".csv":
        return _read_csv(path)
    if ext == ".jsonl":
        return _read_jsonl(path)
    if ext == ".parquet":
        return _read_parquet(path)
    raise InputError(f"manifest {path}: unknown kind {ext or '(no extension)'!r}; use .csv, .jsonl or .parquet")


def _read_csv(path: str) -> tuple[list[str], Iterator[tuple[int, dict[str, Any]]]]:
    csv.field_size_limit(max(csv.field_size_limit(), _CSV_FIELD_LIMIT))
    with open(path, encoding="utf-8-sig", errors="surrogateescape", newline="") as f:
        reader = csv.reader(f)
        try:
            header = next(reader, None)
            body = list(reader)
        except csv.Error as e:
            raise InputError(f"manifest {path}: not valid CSV near line {reader.line_num} ({e})") from e
    if header is None:
        raise InputError(f"manifest {path}: empty file; the first line must name the columns")
    width = len(header)

    def records() -> Iterator[tuple[int, dict[str, Any]]]:
        for n, values in enumerate(body, start=1):
            if not values:  # a blank line
                continue
            cells = (values + [""] * width)[:width]
            yield n, {h: (v if v != "" else None) for h, v in zip(header, cells)}

    return header, records()


def _read_jsonl(path: str) -> tuple[list[str], Iterator[tuple[int, dict[str, Any]]]]:
    columns: dict[str, None] = {}
    recs: list[tuple[int, dict[str, Any]]] = []
    with open(path, "rb") as f:
        for n, line in enumerate(f, start=1):
            text = line.decode("utf-8", "surrogateescape").strip().lstrip("\ufeff")
            if not text:
                continue
            try:
                obj = json.loads(text)
            except (ValueError, RecursionError) as e:
                raise InputError(f"manifest {path}: line {n} is not valid JSON ({e})") from e
            if not isinstance(obj, dict):
                raise InputError(f"manifest {path}: line {n} is not a JSON object")
            for k in obj:
                columns.setdefault(k, None)
            recs.append((n, obj))
    return list(columns), iter(recs)


def _read_parquet(path: str) -> tuple[list[str], Iterator[tuple[int, dict[str, Any]]]]:
    import pyarrow.parquet as pq

    try:
        table = pq.read_table(path)
    except OSError:
        raise
    except Exception as e:  # noqa: BLE001 - pyarrow raises several kinds for a bad file
        raise InputError(f"manifest {path}: not a readable Parquet file ({e})") from e
    names = table.column_names
    cols = [table.column(c).to_pylist() for c in names]

    def records() -> Iterator[tuple[int, dict[str, Any]]]:
        for n, values in enumerate(zip(*cols), start=1):
            yield n, dict(zip(names, values))

    return names, records()


def _text(v: Any) -> str | None:
    """A cell as text for a path or an id; None when empty."""
    if v is None:
        return None
    if isinstance(v, (bytes, bytearray)):
        v = bytes(v).decode("utf-8", "surrogateescape")
    elif not isinstance(v, str):
        v = json.dumps(v, default=str)
    return v if v != "" else None


def _caption(v: Any) -> tuple[bytes | None, str | None]:
    if v is None or v == "" or v == b"":
        return None, "caption_missing"
    if isinstance(v, str):
        return raw_caption(v), None
    if isinstance(v, (bytes, bytearray)):
        return bytes(v), None
    return None, "caption_unreadable"


def _stat(path: str) -> tuple[str | None, int | None, int | None]:
    try:
        st = os.stat(path)
    except (OSError, ValueError):
        return "unreadable", None, None
    if not stat.S_ISREG(st.st_mode):
        return "unreadable", None, None
    problem = None if os.access(path, os.R_OK) else "unreadable"
    return problem, st.st_size, st.st_mtime_ns
