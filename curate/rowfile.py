"""Small per-sample row files a person writes (reviewer decisions, probe labels): CSV with a header,
or JSON Lines, each row naming its sample by `sample_id` or `source`."""
from __future__ import annotations

import csv
import io
import json
from pathlib import Path

from .errors import ConfigError


def read_rows(text: str, path: str | Path, what: str, field: str, key: str) -> list[tuple[int, dict]]:
    """(line number, row) pairs of a `what` file (".jsonl", ".ndjson", ".json": JSON Lines, else CSV
    whose header has `field` and sample_id or source); ConfigError for `key` naming the line."""
    if Path(path).suffix.lower() in (".jsonl", ".ndjson", ".json"):
        return _jsonl(text, path, what, key)
    reader = csv.DictReader(io.StringIO(text), strict=True)
    names = set(reader.fieldnames or ())
    if field not in names or not {"sample_id", "source"} & names:
        raise ConfigError(f"{what} file {path}: the header needs {field} and sample_id or source", key=key)
    try:
        return [(reader.line_num, dict(row)) for row in reader]
    except csv.Error as e:
        raise ConfigError(f"{what} file {path}, line {reader.line_num}: {e}", key=key) from e


def _jsonl(text: str, path: str | Path, what: str, key: str) -> list[tuple[int, dict]]:
    out = []
    for i, line in enumerate(text.splitlines(), 1):
        if not line.strip():
            continue
        try:
            row = json.loads(line)
        except ValueError as e:
            raise ConfigError(f"{what} file {path}, line {i}: not JSON ({e})", key=key) from e
        if not isinstance(row, dict):
            raise ConfigError(f"{what} file {path}, line {i}: expected an object", key=key)
        out.append((i, row))
    return out
