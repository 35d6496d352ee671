"""Manifest input: a CSV, JSONL or Parquet table with one row per sample.

- Columns: `input.image_column` (path relative to the manifest's folder, or
  absolute), `input.caption_column`, optional `input.id_column`. A missing
  column is an InputError naming it and the columns that exist. Every other
  column goes into `meta` as a JSON object (bytes as base64, dates ISO 8601).
- `source` is the image path as written, with `.` and empty parts dropped
  (`./imgs//a.jpg` -> `imgs/a.jpg`). Without an id column the identity is
  the source; with one, sample_id = stable_id(id text) and an empty id is an
  InputError. Two rows with one identity (one path listed twice, a repeated
  id) all get `source_duplicate`, numbered in row order.
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
- Streaming: the manifest is read twice, row by row, and never held whole.
  The first pass checks its structure (every error above is raised before
  any row is handed out) and finds the identities held by more than one row
  (SeenIds: 8 bytes per row while it runs); the second pass builds the rows
  in manifest row order. Parquet is read in record batches, and its first
  pass reads only the image and id columns.
- Object stores: a manifest given as a URL is read through the store (never
  copied), and its image paths resolve on the same store: relative to the
  manifest's folder, absolute on that store, or a URL of that store. They must
  stay inside the manifest's folder (`..` resolved by name: stores have no
  links) unless `input.allow_outside_root`. A URL of another store or
  protocol (`file:///etc/passwd` in an `s3://` manifest, `http://...` in any
  manifest) is `outside_root` and never opened, even with
  `input.allow_outside_root`. A local manifest reads `file://` URLs as local
  paths and refuses other URLs the same way. Each row's size and stamp cost
  one metadata request to the store (made FETCH_THREADS at a time).
"""
from __future__ import annotations

import csv
import io
import json
import os
import posixpath
from concurrent.futures import ThreadPoolExecutor
from typing import Any, BinaryIO, Callable, Iterator

import numpy as np
import pyarrow as pa

from ..config import InputConfig
from ..errors import InputError
from . import stores
from .base import stable_id
from .common import (
    Scope,
    SeenIds,
    clean_text,
    make_row,
    marked_batches,
    meta_json,
    normalize_name,
    raw_caption,
)

MANIFEST_EXTENSIONS = (".csv", ".jsonl", ".parquet")

# CSV cells may hold long captions; the csv module's default cap is 128 KiB.
_CSV_FIELD_LIMIT = 1 << 24

# Rows whose image paths are checked together (and ids looked up together in the first pass).
CHUNK = 4096
# Concurrent metadata requests to an object store (our choice; fsspec's async stores take many more).
FETCH_THREADS = 16

Opener = Callable[[], BinaryIO]
# (problem, size, mtime_ns, locator) for each image path as written (None: the row has none).
Checker = Callable[[list[str]], list[tuple[str | None, int | None, int | None, str]]]


def manifest_batches(name: str, opener: Opener, cfg: InputConfig, check: Checker,
                     batch_rows: int) -> Iterator[pa.RecordBatch]:
    """The manifest's rows as SOURCE_SCHEMA batches in row order. `name` names it in messages;
    `opener` opens it (binary); `check` checks a list of image paths. Runs the first pass now:
    a malformed manifest raises InputError here, before any batch."""
    reader = _reader(name, opener)
    columns, shared = _first_pass(reader, cfg)
    return marked_batches(_rows(reader, cfg, columns, check), shared, batch_rows)


def local_checker(path: str, scope: Scope) -> Checker:
    """Checks image paths of a local manifest at `path` (its folder is the root)."""
    base = os.path.dirname(path)

    def check(images: list[str]) -> list[tuple[str | None, int | None, int | None, str]]:
        out = []
        for image in images:
            if stores.is_url(image):
                try:
                    local = stores.local_path(image)
                except InputError:
                    local = None
                if local is None:
                    out.append(("outside_root", None, None, ""))  # another store or protocol: never followed
                    continue
                image = local
            out.append(scope.check_file(os.path.join(base, image), resolve=True))
        return out

    return check


def store_checker(store: stores.Store, path: str, allow_outside: bool, max_bytes: int) -> Checker:
    """Checks image paths of a manifest at store path `path` (its folder is the root)."""
    root = posixpath.dirname(path) or "/"
    protocols = store.fs.protocol if isinstance(store.fs.protocol, (tuple, list)) else (store.fs.protocol,)

    def where(image: str) -> str | None:
        if stores.is_url(image):
            if stores.scheme(image) not in protocols or "::" in image:
                return None
            return store.fs._strip_protocol(image)
        return image if image.startswith("/") else stores.join(root, image)

    def check(images: list[str]) -> list[tuple[str | None, int | None, int | None, str]]:
        out: list[Any] = []
        todo: list[tuple[int, str]] = []
        for image in images:
            p = where(image)
            if p is None or not (allow_outside or stores.inside(root, p)):
                out.append(("outside_root", None, None, ""))
                continue
            p = posixpath.normpath(p)
            todo.append((len(out), p))
            out.append(None)
        if todo:
            with ThreadPoolExecutor(min(FETCH_THREADS, len(todo))) as pool:
                for (i, p), res in zip(todo, pool.map(lambda t: _store_check(store, t[1], max_bytes), todo)):
                    out[i] = res
        return out

    return check


def _store_check(store: stores.Store, path: str, max_bytes: int) -> tuple[str | None, int | None, int | None, str]:
    try:
        info = store.info(path)
    except Exception:  # noqa: BLE001 - missing, no permission, a network fault: this row cannot be read
        return "unreadable", None, None, store.url(path)
    kind = stores.kind_of(info)
    if kind == "dir":
        return "unreadable", None, None, ""
    if kind != "file":
        return "special_file", None, None, ""
    size, mtime = stores.stamp(info)
    if size is not None and size > max_bytes:
        return "file_too_large", size, mtime, store.url(path)
    return None, size, mtime, store.url(path)


# ----------------------------------------------------------------------------- the two passes


def _first_pass(reader: "_Reader", cfg: InputConfig) -> tuple[list[str], set[int]]:
    """(columns, ids held by several rows); raises InputError for a malformed manifest."""
    header = reader.header()
    if header is not None:
        _check_columns(reader.name, header, cfg)
    union: dict[str, None] = {}
    seen = SeenIds()
    shared: set[int] = set()
    empty_id: int | None = None
    chunk: list[int] = []

    def flush() -> None:
        ids = np.array(chunk, dtype=np.uint64)
        shared.update(int(i) for i in ids[seen.add(ids)])
        chunk.clear()

    wanted = None if header is None else [c for c in (cfg.image_column, cfg.id_column) if c]
    for n, rec in reader.records(wanted):
        if header is None and not isinstance(rec, _Ragged):
            for k in rec:
                union.setdefault(k, None)
        source, key = _identity(n, rec, cfg, header)
        if cfg.id_column and key is None and not isinstance(rec, _Ragged) and empty_id is None:
            empty_id = n
        chunk.append(int(stable_id(source if key is None else key), 16))
        if len(chunk) >= CHUNK:
            flush()
    if chunk:
        flush()
    columns = header if header is not None else list(union)
    if header is None:
        _check_columns(reader.name, columns, cfg)
    if empty_id is not None:
        raise InputError(f"manifest {reader.name}: row {empty_id} has an empty id in column {cfg.id_column!r}")
    return columns, shared


def _check_columns(name: str, columns: list[str], cfg: InputConfig) -> None:
    wanted = [cfg.image_column, cfg.caption_column] + ([cfg.id_column] if cfg.id_column else [])
    for col in wanted:
        if col not in columns:
            raise InputError(
                f"manifest {name}: no column {col!r}; its columns are: {', '.join(map(repr, columns)) or '(none)'}"
                " (set input.image_column / input.caption_column / input.id_column)"
            )


def _identity(n: int, rec: Any, cfg: InputConfig, header: list[str] | None) -> tuple[str, str | None]:
    """(source, identity key or None) of one record, exactly as the second pass names it."""
    if isinstance(rec, _Ragged):
        return _ragged_label(n, rec, header), None
    image = _text(rec.get(cfg.image_column))
    source = f"(row {n}: no image path)" if image is None else clean_text(_written(image))[0]
    key = _text(rec.get(cfg.id_column)) if cfg.id_column else None
    return source, key


def _ragged_label(n: int, rec: "_Ragged", header: list[str] | None) -> str:
    return f"(row {n}: {rec.cells} cells, header has {len(header or [])})"


def _written(image: str) -> str:
    """An image path as written, with `.` and empty parts dropped (after the scheme of a URL)."""
    s = stores.scheme(image)
    if s is None:
        return normalize_name(image)
    if not image[: len(s) + 3].lower().endswith("://"):
        return image  # a chained URL: never followed, named as written
    head = image[: len(s) + 3]
    rest = image[len(s) + 3:]
    return head + ("/" if rest.startswith("/") else "") + normalize_name(rest).lstrip("/")


def _rows(reader: "_Reader", cfg: InputConfig, columns: list[str], check: Checker) -> Iterator[dict]:
    # Every other column, the id column included, is kept as metadata for the ledger and the shards.
    extra = [c for c in columns if c not in (cfg.image_column, cfg.caption_column)]
    header = reader.header()
    pending: list[tuple[int, Any]] = []
    for item in reader.records(None):
        pending.append(item)
        if len(pending) >= CHUNK:
            yield from _build(pending, cfg, extra, header, check)
            pending = []
    yield from _build(pending, cfg, extra, header, check)


def _build(records: list[tuple[int, Any]], cfg: InputConfig, extra: list[str], header: list[str] | None,
           check: Checker) -> Iterator[dict]:
    images: list[str] = []
    for _n, rec in records:
        if isinstance(rec, _Ragged):
            continue
        image = _text(rec.get(cfg.image_column))
        if image is not None and clean_text(image)[1] and "\0" not in image:
            images.append(image)
    checked = iter(check(images))
    for n, rec in records:
        if isinstance(rec, _Ragged):
            yield make_row(_ragged_label(n, rec, header), "", order=(b"", n), caption_problem="caption_unreadable",
                           source_problem="row_ragged", meta=meta_json({"cells": rec.values}))
            continue
        image = _text(rec.get(cfg.image_column))
        size = mtime = None
        if image is None:
            source, locator, problem = f"(row {n}: no image path)", "", "image_path_missing"
        else:
            source, ok = clean_text(_written(image))
            if not ok:
                locator, problem = "", "name_not_utf8"
            elif "\0" in image:
                locator, problem = "", "unreadable"
            else:
                problem, size, mtime, locator = next(checked)
        key = _text(rec.get(cfg.id_column)) if cfg.id_column else None
        caption, cproblem = _caption(rec.get(cfg.caption_column))
        yield make_row(
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


# ----------------------------------------------------------------------------- readers


class _Ragged:
    """A CSV row whose cell count differs from the header's: its cells cannot be matched to columns."""

    def __init__(self, values: list[str]):
        self.values = values
        self.cells = len(values)


class _Reader:
    """One manifest file, readable any number of times from the start."""

    def __init__(self, name: str, opener: Opener):
        self.name = name
        self.opener = opener
        self._header: list[str] | None = None

    def header(self) -> list[str] | None:
        """The column names when the format states them up front (CSV, Parquet); None for JSONL."""
        return None

    def records(self, columns: list[str] | None) -> Iterator[tuple[int, Any]]:
        """(row number from 1, record) for each row; `columns`, when given, may limit what is read."""
        raise NotImplementedError


def _reader(name: str, opener: Opener) -> _Reader:
    ext = os.path.splitext(name.rstrip("/"))[1].lower()
    if ext == ".csv":
        return _CsvReader(name, opener)
    if ext == ".jsonl":
        return _JsonlReader(name, opener)
    if ext == ".parquet":
        return _ParquetReader(name, opener)
    raise InputError(f"manifest {name}: unknown kind {ext or '(no extension)'!r}; use .csv, .jsonl or .parquet")


class _CsvReader(_Reader):
    def _open(self) -> tuple[Any, Any]:
        csv.field_size_limit(max(csv.field_size_limit(), _CSV_FIELD_LIMIT))
        text = io.TextIOWrapper(self.opener(), encoding="utf-8-sig", errors="surrogateescape", newline="")
        return text, csv.reader(text, strict=True)

    def _fault(self, reader: Any, e: csv.Error) -> InputError:
        return InputError(f"manifest {self.name}: not valid CSV near line {reader.line_num} ({e}); "
                          "quote cells that hold commas, quotes or line breaks")

    def header(self) -> list[str]:
        if self._header is None:
            text, reader = self._open()
            with text:
                try:
                    header = next(reader, None)
                except csv.Error as e:
                    raise self._fault(reader, e) from e
            if header is None:
                raise InputError(f"manifest {self.name}: empty file; the first line must name the columns")
            seen: set[str] = set()
            for h in header:
                if h in seen:
                    raise InputError(f"manifest {self.name}: the header names column {h!r} twice; each column "
                                     "needs its own name")
                seen.add(h)
            self._header = header
        return self._header

    def records(self, columns: list[str] | None) -> Iterator[tuple[int, Any]]:
        header = self.header()
        width = len(header)
        text, reader = self._open()
        with text:
            try:
                next(reader, None)
                for n, values in enumerate(reader, start=1):
                    if not values:  # a blank line
                        continue
                    if len(values) != width:
                        yield n, _Ragged(values)
                        continue
                    yield n, {h: (v if v != "" else None) for h, v in zip(header, values)}
            except csv.Error as e:
                raise self._fault(reader, e) from e


class _JsonlReader(_Reader):
    def records(self, columns: list[str] | None) -> Iterator[tuple[int, Any]]:
        with self.opener() as f:
            for n, line in enumerate(f, start=1):
                text = line.decode("utf-8", "surrogateescape").strip().lstrip("\ufeff")
                if not text:
                    continue
                try:
                    obj = json.loads(text)
                except (ValueError, RecursionError) as e:
                    raise InputError(f"manifest {self.name}: line {n} is not valid JSON ({e})") from e
                if not isinstance(obj, dict):
                    raise InputError(f"manifest {self.name}: line {n} is not a JSON object")
                yield n, obj


class _ParquetReader(_Reader):
    # Rows per record batch read (our choice: a few MB of captions at a time).
    BATCH = 8192

    def _file(self, f: Any) -> Any:
        import pyarrow.parquet as pq

        try:
            return pq.ParquetFile(f)
        except OSError:
            raise
        except Exception as e:  # noqa: BLE001 - pyarrow raises several kinds for a bad file
            raise InputError(f"manifest {self.name}: not a readable Parquet file ({e})") from e

    def header(self) -> list[str]:
        if self._header is None:
            with self.opener() as f:
                self._header = list(self._file(f).schema_arrow.names)
        return self._header

    def records(self, columns: list[str] | None) -> Iterator[tuple[int, Any]]:
        with self.opener() as f:
            pf = self._file(f)
            n = 0
            try:
                for batch in pf.iter_batches(batch_size=self.BATCH, columns=columns):
                    for rec in batch.to_pylist():
                        n += 1
                        yield n, rec
            except OSError:
                raise
            except (pa.ArrowException, ValueError) as e:
                raise InputError(f"manifest {self.name}: not a readable Parquet file ({e})") from e


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
