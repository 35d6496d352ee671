"""Review sets: a pre-filled decisions file and the contact sheet that goes with it.

`review` picks samples from a finished run (by drop reason, by flag, or whole near-duplicate
groups), writes a decisions file with one row per sample (`sample_id`, `source`, `decision`
pre-filled with today's verdict, an empty `note`) as CSV or JSON Lines, and an HTML contact
sheet beside it with the same samples in the same order, numbered like the file's rows. A
reviewer edits the file while looking at the sheet; `curate run ... --decisions FILE` reads it.
"""
from __future__ import annotations

import csv
import io
import json
from html import escape
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from .. import workdir
from ..errors import InputError, OutputError
from ..ledger import list_has, read_ledger, run_input, take_rows
from . import CSS, cards, check_text, images, meta_facts
from .cards import text

COLUMNS = ("sample_id", "source", "decision", "note")  # the decisions file's columns, in order
DECISIONS = ("keep", "drop")
FORMATS = {".csv": "csv", ".jsonl": "jsonl"}
LIMIT = 200  # samples per review set unless --limit says otherwise: a sitting's work (common practice)
_NEEDED = ("sample_id", "source", "caption", "kept", "reasons", "flags", "split", "width", "height", "agreement",
           "group_id", "dup_of", "dup_signal", "dup_distance", "checks")
_CHOOSE = ("sample_id", "kept", "reasons", "flags", "split", "group_id", "dup_distance")


def review(run_dir: str | Path, *, reason: str | None = None, flag: str | None = None, group: bool = False,
           limit: int | None = LIMIT, out: str | Path, load_images: Any = None) -> dict:
    """Write the decisions file `out` (.csv or .jsonl) and its contact sheet (`out` with .html).

    Without reason, flag or group: every sample that was dropped, flagged or quarantined. With
    group: whole near-duplicate groups, largest first, keeper first. Filters combine (AND).
    Returns the two paths and how many samples were written and matched."""
    out = Path(out)
    fmt = FORMATS.get(out.suffix.lower())
    if fmt is None:
        raise InputError(f"--out {out}: give a file ending in .csv or .jsonl (the decisions file's format)")
    if limit is not None and limit < 1:
        raise InputError(f"--limit must be 1 or more, got {limit}")
    sheet = out.with_suffix(".html")
    pf, have = _open(run_dir)
    # the small columns that choose the rows first; the wide ones (captions, checks) only for those rows
    t = pf.read(columns=[c for c in _CHOOSE if c in have]).replace_schema_metadata(None)
    rows, matched, groups = _select(t, reason, flag, group, limit)
    wide = [c for c in _NEEDED if c in have] + sorted(c for c in have if c.startswith("meta."))
    picked = take_rows(pf, wide, rows).to_pylist() if rows.size else []
    _check_dirs(out)
    workdir.write_bytes(out, _decisions(picked, fmt).encode("utf-8"))
    if load_images is None:
        load_images = images.output_loader(run_dir)
    thumbs, note = images.thumbnails(load_images, [r["sample_id"] for r in picked if r.get("sample_id")])
    root, _ = run_input(run_dir)
    what = _describe(reason, flag, group)
    workdir.write_bytes(sheet, _sheet(picked, groups, thumbs, note, out.name, fmt, what, matched, root,
                                      str(run_dir)).encode("utf-8"))
    return {"decisions": str(out), "sheet": str(sheet), "rows": len(picked), "matched": matched, "format": fmt}


def _open(run_dir: str | Path) -> tuple[Any, list[str]]:
    """The run's ledger as a Parquet file and its column names (a clear error when there is none)."""
    import pyarrow.parquet as pq

    read_ledger(run_dir, columns=["sample_id"])  # raises InputError naming the folder when absent or broken
    pf = pq.ParquetFile(Path(run_dir) / "ledger.parquet")
    return pf, pf.schema_arrow.names


def _check_dirs(out: Path) -> None:
    """Create the folder of --out; refuse an --out that is a folder."""
    if out.is_dir():
        raise OutputError(f"--out {out} is a folder; give a file ending in .csv or .jsonl")
    try:
        out.parent.mkdir(parents=True, exist_ok=True)
    except OSError as e:
        raise OutputError(f"--out {out}: cannot create {out.parent} ({e.strerror or e})") from e


def _select(t: pa.Table, reason: str | None, flag: str | None, group: bool,
            limit: int | None) -> tuple[np.ndarray, int, list[tuple[str, int, int]]]:
    """Row indices to review (ledger order, or group by group), how many matched, and for group
    mode (group_id, first position, size shown) per group."""
    n = t.num_rows
    kept = pc.fill_null(t.column("kept"), False).to_numpy(zero_copy_only=False).astype(bool)
    mask = np.ones(n, bool)
    if reason is not None:
        mask &= list_has(t.column("reasons"), reason, prefix=False)
    if flag is not None:
        mask &= list_has(t.column("flags"), flag, prefix=":" not in flag)
    if reason is None and flag is None and not group:
        flagged = pc.fill_null(pc.list_value_length(t.column("flags")), 0).to_numpy(zero_copy_only=False) > 0
        quarantined = pc.fill_null(pc.equal(t.column("split"), "quarantine"), False).to_numpy(
            zero_copy_only=False).astype(bool) if "split" in t.column_names else np.zeros(n, bool)
        mask &= ~kept | flagged | quarantined
    if not group:
        rows = np.flatnonzero(mask)
        return (rows if limit is None else rows[:limit]), int(rows.size), []
    if "group_id" not in t.column_names:
        return np.zeros(0, np.int64), 0, []
    gid = t.column("group_id")
    vc = pc.value_counts(gid.combine_chunks().drop_null() if n else pa.array([], pa.string()))
    big = {g: c for g, c in zip(vc.field("values").to_pylist(), vc.field("counts").to_pylist()) if c > 1}
    in_big = pc.fill_null(pc.is_in(gid, value_set=pa.array(sorted(big), pa.string())), False).to_numpy(
        zero_copy_only=False).astype(bool)
    # a group is chosen when any member passes the filters; then all its members are listed
    chosen = set(gid.filter(pa.array(mask & in_big)).to_pylist())
    order = sorted(chosen, key=lambda g: (-big[g], g))
    members = np.flatnonzero(in_big)
    sub = t.take(pa.array(members, pa.int64())).select(["sample_id", "group_id"] + (
        ["dup_distance"] if "dup_distance" in t.column_names else [])).to_pylist()
    by_group: dict[str, list[tuple[int, dict]]] = {}
    for i, r in zip(members.tolist(), sub):
        by_group.setdefault(r["group_id"], []).append((i, r))
    rows_out: list[int] = []
    spans = []
    matched = sum(big[g] for g in order)
    for g in order:
        ms = sorted(by_group.get(g, []), key=lambda p: (p[1]["sample_id"] != g,
                                                       p[1].get("dup_distance") if p[1].get("dup_distance")
                                                       is not None else float("inf"), p[1]["sample_id"]))
        if limit is not None and rows_out and len(rows_out) + len(ms) > limit:
            break
        spans.append((g, len(rows_out), len(ms)))
        rows_out += [i for i, _ in ms]
    return np.asarray(rows_out, np.int64), matched, spans


def _describe(reason: str | None, flag: str | None, group: bool) -> str:
    parts = []
    if reason:
        parts.append(f"dropped for {reason}")
    if flag:
        parts.append(f"flagged {flag}")
    if group:
        parts.append("in near-duplicate groups")
    return " and ".join(parts) if parts else "dropped, flagged or quarantined"


def _decisions(rows: list[dict], fmt: str) -> str:
    recs = [{"sample_id": r["sample_id"], "source": r.get("source") or "",
             "decision": "keep" if r.get("kept") else "drop", "note": ""} for r in rows]
    if fmt == "jsonl":
        return "".join(json.dumps(r, ensure_ascii=False) + "\n" for r in recs)
    buf = io.StringIO()
    w = csv.DictWriter(buf, fieldnames=list(COLUMNS), lineterminator="\n")
    w.writeheader()
    w.writerows(recs)
    return buf.getvalue()


def read_decisions(path: str | Path) -> list[dict]:
    """A decisions file as written by `review` (CSV or JSON Lines by extension), for tests and tools."""
    p = Path(path)
    fmt = FORMATS.get(p.suffix.lower())
    data = p.read_text(encoding="utf-8")
    if fmt == "jsonl":
        return [json.loads(line) for line in data.splitlines() if line.strip()]
    if fmt == "csv":
        return list(csv.DictReader(io.StringIO(data)))
    raise InputError(f"{p}: a decisions file ends in .csv or .jsonl")


def _facts(r: dict) -> list[tuple[str, Any]]:
    state = "quarantine" if r.get("split") == "quarantine" else ("kept" if r.get("kept") else "dropped")
    facts: list[tuple[str, Any]] = [("verdict", state), ("file says", "keep" if r.get("kept") else "drop")]
    for c in r.get("checks") or ():
        if c.get("status") == "fail" and c.get("action") in ("drop", "flag", "quarantine", "redact"):
            facts.append((c["code"], check_text(c)))
    facts.append(("size", cards.size_text(r)))
    if r.get("agreement") is not None:
        facts.append(("agreement", cards.number(r["agreement"])))
    if r.get("split"):
        facts.append(("split", r["split"]))
    if r.get("dup_of"):
        sig, d = r.get("dup_signal"), r.get("dup_distance")
        how = r.get("dup_transform")
        how = f", {how}" if how and how != "identity" else ""
        facts.append(("copy of", f"{r['dup_of']} ({sig}{how}{'' if d is None else f', {cards.number(d)}'})"))
    return facts + meta_facts(r)


def _sheet(rows: list[dict], groups: list[tuple[str, int, int]], thumbs: dict, note: str, fname: str, fmt: str,
           what: str, matched: int, root: str | None, run_dir: str) -> str:
    where = "row there (after the header)" if fmt == "csv" else "line there"
    head = [
        "<h1>Review sheet</h1>",
        f'<p class="meta">Samples {text(what)} in <code>{text(run_dir)}</code>'
        + (f" (input <code>{text(root)}</code>)" if root else "") + f": {len(rows):,} of {matched:,} shown.</p>",
        f'<p class="note">Edit <code>{text(fname)}</code>: each card\'s number is its {where}. Set '
        "<code>decision</code> to <code>keep</code> or <code>drop</code> and say why in "
        "<code>note</code>; leave a row unchanged to accept today's verdict. Then run "
        f"<code>curate run CONFIG --out OUT --decisions {text(fname)}</code>. Flags are screening aids for a "
        "human look, not findings.</p>",
    ]
    if note:
        head.append(f'<p class="note">No thumbnails: {text(note)}.</p>')
    body: list[str] = []

    def one(i: int, r: dict) -> str:
        state = "quarantine" if r.get("split") == "quarantine" else ("kept" if r.get("kept") else "dropped")
        return cards.card(r, thumbs.get(r.get("sample_id")), _facts(r), badge=f"#{i + 1} {state}", state=state)

    if groups:
        for gid, start, size in groups:
            body.append(f'<div class="group" data-group="{text(gid)}"><h3>group <code>{text(gid)}</code> &middot; '
                        f"{size} samples</h3><div class=\"cards\">"
                        + "".join(one(i, rows[i]) for i in range(start, start + size)) + "</div></div>")
    elif rows:
        body.append('<div class="cards">' + "".join(one(i, r) for i, r in enumerate(rows)) + "</div>")
    else:
        body.append('<p class="note">No sample matches.</p>')
    return ("<!doctype html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
            "<meta name=\"viewport\" content=\"width=device-width,initial-scale=1\">"
            f"<title>curate review sheet: {escape(fname)}</title><style>{CSS}</style></head>\n<body><main>\n"
            + "\n".join(head + body) + "\n</main></body></html>\n")
