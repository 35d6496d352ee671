"""Final outputs: ledger, training shards, manifest, summary, resolved config, report.

Everything is written atomically; shards go to a temporary folder that replaces
`shards/` in one rename, so a killed run never leaves a half-written shard set
that looks finished.
"""
from __future__ import annotations

import hashlib
import shutil
from collections import Counter
from pathlib import Path
from typing import Any

import pyarrow as pa
import pyarrow.parquet as pq

from . import __version__, workdir
from .config import PipelineConfig
from .ledger import build_ledger
from .stages.base import base_code

SHARD_COLUMNS = [
    ("sample_id", pa.string()),
    ("source", pa.string()),
    ("caption", pa.string()),
    ("image", pa.binary()),
    ("image_format", pa.string()),
    ("width", pa.int32()),
    ("height", pa.int32()),
    ("sha256", pa.string()),
    ("agreement", pa.float32()),
    ("clip_score", pa.float32()),
    ("group_id", pa.string()),
    ("flags", pa.list_(pa.string())),
    ("caption_tokens", pa.int32()),
]


def joined_table(work: Path, plan: list, shards: list[str]) -> pa.Table:
    from .runner import InputRef, assemble, output_path, shard_refs

    per_shard = [ps.stage.name for ps in plan if ps.stage.kind == "shard"]
    parts = [shard_refs(work, shard, per_shard) for shard in shards]
    extra = [InputRef(str(output_path(work, ps.stage.name))) for ps in plan if ps.stage.kind == "global"]
    return assemble(parts, extra, "pack")


def write_outputs(cfg: PipelineConfig, out: Path, work: Path, plan: list, shards: list[str], fps: dict,
                  src_fp: dict) -> dict:
    joined = joined_table(work, plan, shards)
    order = [ps.stage.name for ps in plan]
    ledger = build_ledger(joined, order, cfg.decide.actions)
    comp = None if cfg.pack.compression == "none" else cfg.pack.compression
    workdir.write_table(out / "ledger.parquet", ledger, compression=comp)
    (out / "config.resolved.toml").write_text(
        "# The config this run used: defaults < pipeline file < --set.\n" + cfg.to_toml(), encoding="utf-8"
    )
    run_fp = workdir.fingerprint(__version__, cfg.fingerprint(), fps, src_fp)
    shard_entries = _write_shards(cfg, out, ledger, joined) if cfg.pack.enabled else []
    summary = summarize(ledger, plan)
    manifest = {
        "tool": "curate",
        "version": __version__,
        "config_fingerprint": cfg.fingerprint(),
        "run_fingerprint": run_fp,
        "stages": {ps.stage.name: {"version": ps.stage.version, "kind": ps.stage.kind, **ps.identity} for ps in plan},
        "samples": ledger.num_rows,
        "kept": summary["kept"],
        "shards": shard_entries,
    }
    workdir.write_json(out / "manifest.json", manifest)
    workdir.write_json(out / "summary.json", summary)
    from .report import write_report

    write_report(out, ledger, summary, cfg)
    return manifest


def _write_shards(cfg: PipelineConfig, out: Path, ledger: pa.Table, joined: pa.Table) -> list[dict]:
    from .sources import read_bytes
    from .stages.pack import encode_image

    pcfg = cfg.pack
    tmp = out / ".shards-new"
    old = out / ".shards-old"
    for p in (tmp, old):
        if p.exists():
            shutil.rmtree(p)
    kept = ledger.filter(ledger.column("kept"))
    locator = dict(zip(joined.column("sample_id").to_pylist(), joined.column("locator").to_pylist()))
    entries: list[dict] = []
    rows = kept.select([c for c, _ in SHARD_COLUMNS if c not in ("image", "image_format")]).to_pylist()
    fmt_of = dict(zip(ledger.column("sample_id").to_pylist(), ledger.column("format").to_pylist()))
    splits = kept.column("split").to_pylist()
    by_split: dict[str, list[dict]] = {}
    for r, s in zip(rows, splits):
        by_split.setdefault(s or "train", []).append(r)
    for split in sorted(by_split):
        batch: list[dict] = []
        nbytes = 0
        part = 0
        items = by_split[split]
        for start in range(0, len(items), 256):
            chunk = items[start : start + 256]
            for r, data in zip(chunk, read_bytes([locator[r["sample_id"]] for r in chunk])):
                if isinstance(data, Exception):
                    raise OSError(f"cannot re-read {r['source']} for packing: {data}") from data
                img, fmt, w, h = encode_image(data, pcfg)
                row = dict(r)
                row["image"] = img
                row["image_format"] = fmt or fmt_of.get(r["sample_id"])
                if w is not None:
                    row["width"], row["height"] = w, h
                batch.append(row)
                nbytes += len(img)
                if len(batch) >= pcfg.max_rows or nbytes >= pcfg.max_bytes:
                    entries.append(_flush(tmp, split, part, batch, pcfg))
                    part += 1
                    batch, nbytes = [], 0
        if batch:
            entries.append(_flush(tmp, split, part, batch, pcfg))
    tmp.mkdir(parents=True, exist_ok=True)
    final = out / "shards"
    if final.exists():
        final.rename(old)
    tmp.rename(final)
    if old.exists():
        shutil.rmtree(old)
    return entries


def _flush(tmp: Path, split: str, part: int, batch: list[dict], pcfg: Any) -> dict:
    table = pa.Table.from_pylist(
        [{c: r.get(c) for c, _ in SHARD_COLUMNS} for r in batch], schema=pa.schema(SHARD_COLUMNS)
    )
    rel = Path("shards") / split / f"part-{part:05d}.parquet"
    path = tmp / split / f"part-{part:05d}.parquet"
    path.parent.mkdir(parents=True, exist_ok=True)
    pq.write_table(table, path, compression=None if pcfg.compression == "none" else pcfg.compression,
                   row_group_size=1024)
    data = path.read_bytes()
    return {"path": rel.as_posix(), "split": split, "rows": table.num_rows, "bytes": len(data),
            "sha256": hashlib.sha256(data).hexdigest()}


def summarize(ledger: pa.Table, plan: list) -> dict:
    kept = ledger.column("kept").to_pylist()
    reasons = ledger.column("reasons").to_pylist()
    flags = ledger.column("flags").to_pylist()
    stopped = ledger.column("stopped_at").to_pylist()
    split = ledger.column("split").to_pylist()
    checks = ledger.column("checks").to_pylist()
    by_reason: Counter = Counter()
    only_reason: Counter = Counter()
    for r in reasons:
        codes = {base_code(c) for c in r}
        by_reason.update(codes)
        if len(codes) == 1:
            only_reason.update(codes)
    by_flag: Counter = Counter(base for f in flags for base in {c for c in f})
    by_stage: dict[str, dict[str, int]] = {ps.stage.name: {"checked": 0, "failed": 0, "dropped": 0}
                                           for ps in plan}
    for cl in checks:
        seen: set[str] = set()
        failed: set[str] = set()
        dropped: set[str] = set()
        for c in cl:
            seen.add(c["stage"])
            if c["failed"]:
                failed.add(c["stage"])
                if c["action"] == "drop":
                    dropped.add(c["stage"])
        for s in seen:
            d = by_stage.setdefault(s, {"checked": 0, "failed": 0, "dropped": 0})
            d["checked"] += 1
            d["failed"] += s in failed
            d["dropped"] += s in dropped
    n = len(kept)
    k = sum(kept)
    return {
        "samples": n,
        "kept": k,
        "dropped": n - k,
        "kept_fraction": round(k / n, 4) if n else 0.0,
        "by_reason": dict(sorted(by_reason.items(), key=lambda kv: (-kv[1], kv[0]))),
        "by_only_reason": dict(sorted(only_reason.items(), key=lambda kv: (-kv[1], kv[0]))),
        "by_flag": dict(sorted(by_flag.items(), key=lambda kv: (-kv[1], kv[0]))),
        "by_stage": by_stage,
        "stopped_at": dict(Counter(s for s in stopped if s)),
        "by_split": dict(Counter(s for s in split if s)),
        "groups": len({g for g in ledger.column("group_id").to_pylist() if g is not None}),
    }
