"""Manifest input: a CSV, JSONL or Parquet table with one row per sample.

- Columns: `input.image_column` (path relative to the manifest's folder, or
  absolute), `input.caption_column`, optional `input.id_column`. A missing
  column is an InputError naming it and the columns that exist. Every other
  column goes into `meta` as a JSON object (bytes as base64, dates ISO 8601).
- `source` is the image path as written, with `.` and empty parts dropped
  (`./imgs//a.jpg` -> `imgs/a.jpg`). Without an id column the identity is
  the source; with one, sample_id = stable_id(id text) and an empty id is an
  InputError. Two rows with one identity (one path listed twice, a repeated
  id) both get `source_duplicate`.
- The image path must resolve (links followed) inside the manifest's folder,
  which is the input root: an absolute path or one climbing out with `..`
  elsewhere is `outside_root` and never opened, unless
  `input.allow_outside_root` is set. A path that does not exist or may not
  be read is `unreadable`; a FIFO, device or socket is `special_file`; a file
  over `input.max_file_bytes` is `file_too_large`; a row with no image path
  gets the source `(row N: no image path)` and `image_path_missing`.
- An empty or null caption cell -> null caption and `caption_missing`; a
  cell that is not text (a number, a list) -> `caption_unreadable`.
- CSV (RFC 4180): comma separated, first row is the header, UTF-8 (a BOM is
  skipped); bytes that are not UTF-8 reach caption_raw unchanged. An empty
  CSV cell is null (CSV has no other way to write one). A row with more or
  fewer cells than the header (an unquoted comma in a caption, a cut line)
  gets the source `(row N: K cells, header has W)`, `row_ragged`, and its
  cells in `meta`. Broken quoting (a quote never closed, text right after a
  closing quote) or a header naming one column twice is an InputError naming
  the line: past such a fault, where rows begin is unknown.
- JSONL: one object per line, blank lines skipped; a line that is not a JSON
  object is an InputError naming its line number.
"""
from __future__ import annotations

import csv
import json
import os
from typing import Any, Iterator

from ..config import InputConfig
from ..errors import InputError
from .common import Scope, clean_text, make_row, meta_json, normalize_name, raw_caption

MANIFEST_EXTENSIONS = (".csv", ".jsonl", ".parquet")

# CSV cells may hold long captions; the csv module's default cap is 128 KiB.
_CSV_FIELD_LIMIT = 1 << 24


def list_manifest(path: str, cfg: InputConfig, scope: Scope) -> list[dict]:
    """One row per manifest row. `path` is the manifest's absolute path; `scope` is its folder."""
    columns, records = _read(path)
    wanted = [cfg.image_column, cfg.caption_column] + ([cfg.id_column] if cfg.id_column else [])
    for col in wanted:
        if col not in columns:
            raise InputError(
                f"manifest {path}: no column {col!r}; its columns are: {', '.join(map(repr, columns)) or '(none)'}"
                " (set input.image_column / input.caption_column / input.id_column)"
            )
    # Every other column, the id column included, is kept as metadata for the ledger and the shards.
    extra = [c for c in columns if c not in (cfg.image_column, cfg.caption_column)]
    base = os.path.dirname(path)
    rows: list[dict] = []
    for n, rec in records:
        if isinstance(rec, _Ragged):
            label = f"(row {n}: {rec.cells} cells, header has {len(columns)})"
            rows.append(make_row(label, "", order=(b"", n), caption_problem="caption_unreadable",
                                 source_problem="row_ragged", meta=meta_json({"cells": rec.values})))
            continue
        image = _text(rec.get(cfg.image_column))
        if image is None:
            source, locator, problem = f"(row {n}: no image path)", "", "image_path_missing"
            size = mtime = None
        else:
            source, ok = clean_text(normalize_name(image))
            if not ok:
                locator, problem, size, mtime = "", "name_not_utf8", None, None
            elif "\0" in image:
                locator, problem, size, mtime = "", "unreadable", None, None
            else:
                problem, size, mtime, locator = scope.check_file(os.path.join(base, image), resolve=True)
        key = None
        if cfg.id_column:
            ident = _text(rec.get(cfg.id_column))
            if ident is None:
                raise InputError(f"manifest {path}: row {n} has an empty id in column {cfg.id_column!r}")
            key = ident
        caption, cproblem = _caption(rec.get(cfg.caption_column))
        rows.append(
            make_row(
                source,
                locator,
                key=key,
                order=(b"", n),
                caption_raw=caption,
                caption_problem=cproblem,
                source_problem=problem,
                file_size=size,
                mtime_ns=mtime,
                meta=meta_json({c: rec.get(c) for c in extra}) if extra else None,
            )
        )
    return rows


class _Ragged:
    """A CSV row whose cell count differs from the header's: its cells cannot be matched to columns."""

    def __init__(self, values: list[str]):
        self.values = values
        self.cells = len(values)


def _read(path: str) -> tuple[list[str], Iterator[tuple[int, dict[str, Any]]]]:
    ext = os.path.splitext(path)[1].lower()
    if ext == ".csv":
        return _read_csv(path)
    if ext == ".jsonl":
        return _read_jsonl(path)
    if ext == ".parquet":
        return _read_parquet(path)
    raise InputError(f"manifest {path}: unknown kind {ext or '(no extension)'!r}; use .csv, .jsonl or .parquet")


def _read_csv(path: str) -> tuple[list[str], Iterator[tuple[int, Any]]]:
    csv.field_size_limit(max(csv.field_size_limit(), _CSV_FIELD_LIMIT))
    with open(path, encoding="utf-8-sig", errors="surrogateescape", newline="") as f:
        reader = csv.reader(f, strict=True)
        try:
            header = next(reader, None)
            body = list(reader)
        except csv.Error as e:
            raise InputError(f"manifest {path}: not valid CSV near line {reader.line_num} ({e}); "
                             "quote cells that hold commas, quotes or line breaks") from e
    if header is None:
        raise InputError(f"manifest {path}: empty file; the first line must name the columns")
    seen: set[str] = set()
    for h in header:
        if h in seen:
            raise InputError(f"manifest {path}: the header names column {h!r} twice; each column needs its own name")
        seen.add(h)
    width = len(header)

    def records() -> Iterator[tuple[int, Any]]:
        for n, values in enumerate(body, start=1):
            if not values:  # a blank line
                continue
            if len(values) != width:
                yield n, _Ragged(values)
                continue
            yield n, {h: (v if v != "" else None) for h, v in zip(header, values)}

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
