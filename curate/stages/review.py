"""review: a reviewer's decisions, applied as checks of their own that survive re-runs.

`curate run ... --decisions FILE` (or `[review] decisions`) names a CSV or JSONL file with
`sample_id` (or `source`), `decision` (`keep` or `drop`) and an optional `note`, the format
`curate review` writes. A `drop` decision drops the sample (`review_drop`); a `keep` decision
(`review_keep`) overrides every check that dropped it, except those that make an image unusable
(it cannot be decoded, read or packed). Both are recorded in the ledger with the note. The file's
content is part of the run's fingerprints: editing it re-runs what depends on the verdict, and
nothing else. A decision naming no sample of the input is reported in the run's notes.
"""
from __future__ import annotations

import hashlib
import logging
from dataclasses import dataclass, field
from pathlib import Path

import pyarrow as pa

from ..checks import CHECKS_TYPE, check
from ..errors import ConfigError
from ..rowfile import read_rows
from .base import CheckSpec, ConfigView, StageContext, checks_column, stage

log = logging.getLogger("curate")

NAME = "review"
VERSION = "1"
KEEP, DROP = "review_keep", "review_drop"


@dataclass
class ReviewConfig:
    enabled: bool = True
    # A reviewer's decisions (CSV or JSONL: sample_id or source, decision keep|drop, note), as
    # `curate review` writes them; empty: none. `curate run --decisions FILE` sets it.
    decisions: str = field(default="", metadata={"path": True})


CHECKS = (
    CheckSpec(DROP, "drop", "a reviewer dropped this sample (the note says why)", ("drop",)),
    CheckSpec(KEEP, "keep", "a reviewer kept this sample: it overrides the checks that dropped it, except those "
              "that make the image unusable", ("keep",)),
)


@dataclass(frozen=True)
class Decision:
    key: str  # sample_id or source
    by: str  # "sample_id" | "source"
    keep: bool
    note: str
    line: int


def read_decisions(path: str) -> list[Decision]:
    """Parse a decisions file; ConfigError naming the line when a row is malformed."""
    p = Path(path)
    try:
        raw = p.read_bytes()
    except OSError as e:
        raise ConfigError(f"decisions file {path} cannot be read ({e.strerror or e})", key="review.decisions") from e
    try:
        text = raw.decode("utf-8-sig")
    except UnicodeDecodeError as e:
        raise ConfigError(f"decisions file {path} is not UTF-8 text", key="review.decisions") from e
    rows = read_rows(text, path, "decisions", "decision", "review.decisions")
    out = []
    for line, row in rows:
        key_by = next(((str(row[k]).strip(), k) for k in ("sample_id", "source") if str(row.get(k) or "").strip()),
                      None)
        if key_by is None:
            raise ConfigError(f"decisions file {path}, line {line}: needs a sample_id or a source",
                              key="review.decisions")
        decision = str(row.get("decision") or "").strip().lower()
        if decision not in ("keep", "drop"):
            raise ConfigError(f"decisions file {path}, line {line}: decision must be keep or drop, got {decision!r}",
                              key="review.decisions")
        out.append(Decision(key_by[0], key_by[1], decision == "keep", str(row.get("note") or "").strip(), line))
    return out


def _identity(view: ConfigView) -> dict:
    path = view.section(NAME).decisions
    decisions = read_decisions(path)  # a malformed file stops the run before any work
    return {"decisions": path, "sha256": hashlib.sha256(Path(path).read_bytes()).hexdigest(),
            "count": len(decisions)}


@stage(name=NAME, version=VERSION, config=ReviewConfig, kind="global", phase="check", needs=("source",),
       checks=CHECKS, active_if=lambda view: bool(view.section(NAME).decisions), parallel="inline",
       identity=_identity)
def run(table: pa.Table, cfg: ReviewConfig, ctx: StageContext) -> pa.Table:
    """A reviewer's keep and drop decisions, as checks."""
    decisions = read_decisions(cfg.decisions)
    by_id = {d.key: d for d in decisions if d.by == "sample_id"}
    by_source = {d.key: d for d in decisions if d.by == "source"}
    used: set[tuple[str, str]] = set()
    out: list[list[dict]] = []
    for sid, src in zip(table.column("sample_id").to_pylist(), table.column("source").to_pylist()):
        d = by_id.get(sid) or by_source.get(src)
        if d is None:
            out.append([])
            continue
        used.add((d.by, d.key))
        out.append([check(KEEP if d.keep else DROP, failed=True, detail=d.note or None)])
    unknown = [d for d in decisions if (d.by, d.key) not in used]
    if unknown:
        shown = ", ".join(f"{d.key} (line {d.line})" for d in unknown[:5]) + (" ..." if len(unknown) > 5 else "")
        log.warning("decisions file %s: %d decision(s) name no sample of this input: %s", cfg.decisions,
                    len(unknown), shown)
    if ctx.progress is not None:
        ctx.progress.advance(table.num_rows)
    return pa.table({"sample_id": table.column("sample_id"), checks_column(NAME): pa.array(out, CHECKS_TYPE)})
