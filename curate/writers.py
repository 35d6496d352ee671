"""Final outputs: ledger, training shards, manifest, summary, resolved config, report.

The ledger's columns come from the stage declarations (every registered stage's
ledger columns, null where the stage did not run), the verdict from curate.decide.
Shards carry the image bytes, re-read and checked against the SHA-256 recorded
when the image was inspected, so no byte reaches a shard that was not inspected.
Everything is written atomically; shards go to a temporary folder that replaces
`shards/` in one rename, so a killed run never leaves a half-written shard set.
"""
from __future__ import annotations

import hashlib
import json
import logging
import shutil
from collections import Counter
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from . import __version__, decide, layout, workdir
from .checks import check
from .config import PipelineConfig
from .plan import SOURCE, Plan
from .stages import REGISTRY, Column
from .stages.inspect import CHANGED
from .stages.risk import redacted_caption

log = logging.getLogger("curate")

# Columns every shard row has, besides the stages' shard columns.
CORE_SHARD = (
    Column("sample_id", pa.string()),
    Column("source", pa.string()),
    Column("caption", pa.string()),
    Column("image", pa.binary()),
    Column("image_format", pa.string()),
    Column("width", pa.int32()),
    Column("height", pa.int32()),
    Column("split", pa.string()),
    Column("review_flags", pa.list_(pa.string())),
)
BUCKET = (Column("bucket", pa.string(), "training bucket WIDTHxHEIGHT ([pack] buckets)", shard=True),
          Column("bucket_crop", pa.float32(), "share of the image a centre crop to the bucket loses", shard=True))
VERDICT = (
    Column("kept", pa.bool_()),
    Column("reasons", pa.list_(pa.string())),
    Column("flags", pa.list_(pa.string())),
    Column("split", pa.string()),
    Column("stopped_at", pa.string()),
)


def joined_table(work: Path, plan: Plan, shards: list[str], wanted: set[str] | None = None) -> pa.Table:
    """The source table with every active stage's columns (those in `wanted`, and all check columns)."""
    def cols(st_name: str, names: list[str]) -> tuple[str, ...] | None:
        return None if wanted is None else tuple(c for c in names if c in wanted or c.endswith(".checks"))

    per_shard = [ps for ps in plan.stages if ps.stage.kind == "shard"]
    parts = []
    for shard in shards:
        refs = [layout.InputRef(str(layout.output_path(work, SOURCE, shard)))]
        for ps in per_shard:
            names = [c.name for c in ps.columns if not c.transient] + [ps.stage.checks_column]
            refs.append(layout.InputRef(str(layout.output_path(work, ps.name, shard)), columns=cols(ps.name, names)))
        parts.append(refs)
    table = layout.assemble(parts, "outputs")
    for ps in plan.stages:
        if ps.stage.kind == "global":
            names = [c.name for c in ps.columns] + [ps.stage.checks_column]
            ref = layout.InputRef(str(layout.output_path(work, ps.name)), columns=cols(ps.name, names))
            table = layout.hstack([table, layout.read_ref(ref)], "outputs")
    return table


def ledger_columns(cfg: PipelineConfig) -> list[Column]:
    """Every registered stage's ledger columns, in registry order (whether or not it runs)."""
    out: dict[str, Column] = {}
    for st in REGISTRY.values():
        try:
            cols = st.columns(st.view(cfg))
        except Exception:  # noqa: BLE001 - an inactive stage whose settings cannot describe its columns
            continue
        for c in cols:
            if c.ledger and not c.transient and c.name not in out:
                out[c.name] = c
    return list(out.values())


META_PREFIX = "meta."
# At most this many metadata columns reach the outputs (a manifest with thousands of columns would
# otherwise swamp the ledger); the rest stay in the source table's `meta` JSON.
META_MAX = 200


def meta_columns(joined: pa.Table) -> list[tuple[str, pa.Array]]:
    """A manifest's extra columns (licence, credit, source URL, its own id ...) as `meta.<name>` columns."""
    if "meta" not in joined.column_names:
        return []
    parsed = []
    for text in joined.column("meta").to_pylist():
        try:
            obj = json.loads(text) if text else {}
        except ValueError:
            obj = {}
        parsed.append(obj if isinstance(obj, dict) else {})
    keys = sorted({k for obj in parsed for k in obj})
    if len(keys) > META_MAX:
        log.warning("the input has %d metadata columns; the first %d (by name) reach the ledger and shards",
                    len(keys), META_MAX)
        keys = keys[:META_MAX]
    out = []
    for k in keys:
        values = [obj.get(k) for obj in parsed]
        try:
            arr = pa.array(values)
            if pa.types.is_null(arr.type) or pa.types.is_nested(arr.type):
                raise TypeError
        except (pa.ArrowInvalid, pa.ArrowTypeError, TypeError, OverflowError):
            arr = pa.array([None if v is None else (v if isinstance(v, str) else json.dumps(v, ensure_ascii=False))
                            for v in values], pa.string())
        out.append((META_PREFIX + k, arr))
    return out


def run_verdict(joined: pa.Table, plan: Plan, actions: decide.Actions,
                extra: list[tuple[str, pa.Array]] = ()) -> decide.Verdict:
    """The verdict from every stage's checks (and `extra` check columns after them), with the stages each
    dropped sample skipped."""
    n = joined.num_rows
    stage_checks, skipped, skip_codes, cols = [], {}, {}, []
    for ps in plan.stages:
        col = joined.column(ps.stage.checks_column)
        if ps.stage.alive_only:
            skipped[ps.name] = ~decide.alive(cols, actions, n)
            skip_codes[ps.name] = [c.code for c in ps.stage.checks]
        stage_checks.append((ps.name, col))
        cols.append(col)
    return decide.verdict(stage_checks + list(extra), skipped, skip_codes, actions, n)


def write_outputs(cfg: PipelineConfig, out: Path, work: Path, plan: Plan, shards: list[str], fps: dict,
                  src_fp: dict, actions: decide.Actions, result: Any) -> dict:
    lcols = ledger_columns(cfg)
    wanted = {c.name for c in lcols} | {"locator", "decoded", "sha256", "format", "caption", "face_boxes",
                                        "content_box"}
    wanted |= {c.name for ps in plan.stages for c in ps.columns if c.shard}
    joined = joined_table(work, plan, shards, wanted)
    v = run_verdict(joined, plan, actions)
    comp = None if cfg.pack.compression == "none" else cfg.pack.compression
    shard_entries: list[dict] = []
    if cfg.pack.enabled:
        shard_entries, changed = _write_shards(cfg, out, plan, joined, v, assign_buckets(cfg, joined, v))
        if changed:
            v = run_verdict(joined, plan, actions, [("pack", _changed_checks(changed, joined.num_rows))])
            log.warning("%d image(s) changed on disk after they were inspected; they were left out of the shards "
                        "(%s); re-run to inspect them again", len(changed), CHANGED)
            result.changed_rows = sorted(changed)
    ledger = build_ledger(joined, v, lcols, assign_buckets(cfg, joined, v))
    workdir.write_table(out / "ledger.parquet", ledger, compression=comp, row_group_size=65536)
    (out / "config.resolved.toml").write_text(
        "# The config this run used: defaults < pipeline file < --set.\n" + cfg.to_toml(), encoding="utf-8"
    )
    run_fp = workdir.fingerprint(__version__, cfg.fingerprint(), fps, src_fp)
    summary = summarize(ledger, plan)
    summary["notes"] = list(result.notes)
    manifest = {
        "tool": "curate",
        "version": __version__,
        "config_fingerprint": cfg.fingerprint(),
        "run_fingerprint": run_fp,
        "stages": {ps.name: {"version": ps.stage.version, "kind": ps.stage.kind, **ps.identity}
                   for ps in plan.stages},
        "samples": ledger.num_rows,
        "kept": summary["kept"],
        "shards": shard_entries,
    }
    workdir.write_json(out / "manifest.json", manifest)
    workdir.write_json(out / "summary.json", summary)
    from .report import run_facts, write_report
    from .report.images import locator_loader, shard_loader

    loader = locator_loader(joined.select(["sample_id", "locator"]), cfg.input.max_file_bytes, shard_loader(out))
    write_report(out, ledger, summary, cfg, load_images=loader, facts=run_facts(out, manifest))
    return manifest


def assign_buckets(cfg: PipelineConfig, joined: pa.Table, v: decide.Verdict) -> tuple[list, list]:
    """Per row: the training bucket ("WxH") and its centre-crop loss, for kept samples when buckets are on."""
    from .buckets import assign
    from .stages.pack import bucket_list

    n = joined.num_rows
    bl = bucket_list(cfg.pack)
    if not bl or "width" not in joined.column_names:
        return [None] * n, [None] * n
    names, loss = [None] * n, [None] * n
    for i, (w, h) in enumerate(zip(joined.column("width").to_pylist(), joined.column("height").to_pylist())):
        got = assign(w, h, bl) if v.kept[i] else None
        if got is not None:
            names[i], loss[i] = f"{got[0][0]}x{got[0][1]}", got[1]
    return names, loss


def build_ledger(joined: pa.Table, v: decide.Verdict, lcols: list[Column],
                 buckets: tuple[list, list] | None = None) -> pa.Table:
    n = joined.num_rows
    buckets = buckets or ([None] * n, [None] * n)
    names = ["sample_id", "source"]
    arrays = [joined.column("sample_id"), joined.column("source")]
    decoded = (pc.fill_null(joined.column("decoded"), False) if "decoded" in joined.column_names
                else pa.array(np.zeros(n, bool)))
    split = joined.column("split") if "split" in joined.column_names else pa.nulls(n, pa.string())
    kept = pa.array(v.kept)
    final_split = pc.if_else(kept, pc.if_else(pa.array(v.quarantined), "quarantine",
                                              pc.coalesce(split, pa.scalar("train"))), pa.scalar(None, pa.string()))
    for c, values in zip(VERDICT, (kept, v.reasons, v.flags, final_split, v.stopped_at)):
        names.append(c.name)
        arrays.append(values if values.type == c.type else values.cast(c.type))
    sids = joined.column("sample_id")
    for c in lcols:
        if c.name in names:
            continue
        col = joined.column(c.name) if c.name in joined.column_names else pa.nulls(n, c.type)
        if c.name == "group_id":  # every decoded sample has a group: its own when nobody grouped it
            col = pc.coalesce(col, pc.if_else(decoded, sids, pa.scalar(None, pa.string())))
        names.append(c.name)
        arrays.append(col)
    for c, values in zip(BUCKET, buckets):
        names.append(c.name)
        arrays.append(pa.array(values, c.type))
    for name, arr in meta_columns(joined):
        names.append(name)
        arrays.append(arr)
    names.append("checks")
    arrays.append(v.records)
    return pa.Table.from_arrays(arrays, names=names)


def _changed_checks(changed: dict[int, str], n: int) -> pa.Array:
    """The shard writer's own check column: `source_changed` for samples whose bytes changed after inspection."""
    from .checks import CHECKS_TYPE

    return pa.array([[check(CHANGED, failed=True, detail=changed[i])] if i in changed else [] for i in range(n)],
                    CHECKS_TYPE)


def _shard_columns(plan: Plan) -> list[Column]:
    out = {c.name: c for c in CORE_SHARD}
    for ps in plan.stages:
        for c in ps.columns:
            if c.shard and c.name not in out:
                out[c.name] = c
    return list(out.values())


def _write_shards(cfg: PipelineConfig, out: Path, plan: Plan, joined: pa.Table, v: decide.Verdict,
                  buckets: tuple[list, list]) -> tuple[list[dict], dict[int, str]]:
    from .sources import read_bytes
    from .stages.pack import pack_image

    pcfg = cfg.pack
    tmp, old = out / ".shards-new", out / ".shards-old"
    for p in (tmp, old):
        if p.exists():
            shutil.rmtree(p)
    cols = _shard_columns(plan)
    kept = np.flatnonzero(np.asarray(v.kept, dtype=bool))
    take = pa.array(kept, type=pa.int64())
    data = {c.name: joined.column(c.name).take(take).to_pylist() for c in cols if c.name in joined.column_names}
    if any(b is not None for b in buckets[0]):
        for c, values in zip(BUCKET, buckets):
            cols.append(c)
            data[c.name] = [values[i] for i in kept.tolist()]
    for name, arr in meta_columns(joined):
        cols.append(Column(name, arr.type))
        data[name] = arr.take(take).to_pylist()
    split = joined.column("split").take(take).to_pylist() if "split" in joined.column_names else [None] * len(kept)
    locs = joined.column("locator").take(take).to_pylist()
    shas = joined.column("sha256").take(take).to_pylist()
    extra = {c: joined.column(c).take(take).to_pylist() for c in ("face_boxes", "content_box")
             if c in joined.column_names}
    flags, redacted = v.flags_of(kept.tolist()), v.redacted_of(kept.tolist())
    by_split: dict[str, list[int]] = {}
    for j, i in enumerate(kept.tolist()):
        s = "quarantine" if v.quarantined[i] else (split[j] or "train")
        by_split.setdefault(s, []).append(j)
    entries: list[dict] = []
    changed: dict[int, str] = {}
    for name in sorted(by_split):
        writer = _ShardWriter(tmp, name, cols, pcfg)
        items = by_split[name]
        for start in range(0, len(items), 256):
            chunk = items[start:start + 256]
            for j, raw in zip(chunk, read_bytes([locs[j] for j in chunk], max_bytes=cfg.input.max_file_bytes)):
                why = _verify(raw, shas[j])
                if why is not None:
                    changed[int(kept[j])] = why
                    continue
                i = int(kept[j])
                try:
                    packed = pack_image(raw, pcfg, edit=_edits(cfg, {c: extra[c][j] for c in extra}))
                except Exception as e:  # noqa: BLE001 - inspect decoded it, so this is rare; never a crash
                    changed[i] = f"cannot be packed: {type(e).__name__}: {e}"[:160]
                    continue
                row = {c.name: data[c.name][j] for c in cols if c.name in data}
                row.update(image=packed.data, image_format=packed.format, width=packed.width, height=packed.height,
                           split=name, review_flags=flags[j])
                if redacted[j] and row.get("caption"):
                    row["caption"] = redacted_caption(row["caption"], redacted[j], cfg.risk)
                writer.add(row)
        entries += writer.close()
    tmp.mkdir(parents=True, exist_ok=True)
    final = out / "shards"
    if final.exists():
        final.rename(old)
    tmp.rename(final)
    if old.exists():
        shutil.rmtree(old)
    return entries, changed


def _edits(cfg: PipelineConfig, facts: dict) -> Any:
    """The picture edits a shard row needs (faces blurred, bands cropped), as one function, or None."""
    boxes = facts.get("face_boxes") if getattr(cfg.risk, "face_blur", False) else None
    box = facts.get("content_box") if cfg.pack.crop_borders else None
    if not boxes and not box:
        return None

    def edit(img: Any) -> Any:
        import numpy as np
        from PIL import Image

        from .imaging.faces import blur_faces
        from .imaging.quality import crop_to_content

        rgb = np.asarray(img.convert("RGB"))
        if boxes:
            rgb = blur_faces(rgb, [tuple(b) for b in boxes], cfg.faces.blur_margin, cfg.faces.blur_sigma_share)
        if box:
            rgb = crop_to_content(rgb, tuple(box))
        return Image.fromarray(np.ascontiguousarray(rgb))

    return edit


def _verify(raw: bytes | Exception, sha: str | None) -> str | None:
    """Why these bytes must not be packed (they are not the bytes inspect saw), or None."""
    if isinstance(raw, Exception):
        return f"cannot be read again: {type(raw).__name__}"
    if sha is None or hashlib.sha256(raw).hexdigest() != sha:
        return "its bytes differ from those inspected (SHA-256 mismatch)"
    return None


class _ShardWriter:
    """Rows of one split into part files, closed at max_rows or max_bytes of image data."""

    def __init__(self, tmp: Path, split: str, cols: list[Column], pcfg: Any):
        self.tmp, self.split, self.cols, self.pcfg = tmp, split, cols, pcfg
        self.batch: list[dict] = []
        self.nbytes = 0
        self.part = 0
        self.entries: list[dict] = []

    def add(self, row: dict) -> None:
        self.batch.append(row)
        self.nbytes += len(row["image"])
        if len(self.batch) >= self.pcfg.max_rows or self.nbytes >= self.pcfg.max_bytes:
            self._flush()

    def close(self) -> list[dict]:
        if self.batch:
            self._flush()
        return self.entries

    def _flush(self) -> None:
        schema = pa.schema([(c.name, c.type) for c in self.cols])
        table = pa.Table.from_pylist([{c.name: r.get(c.name) for c in self.cols} for r in self.batch], schema=schema)
        rel = Path("shards") / self.split / f"part-{self.part:05d}.parquet"
        path = self.tmp / self.split / f"part-{self.part:05d}.parquet"
        path.parent.mkdir(parents=True, exist_ok=True)
        pq.write_table(table, path, compression=None if self.pcfg.compression == "none" else self.pcfg.compression,
                       row_group_size=1024)
        data = path.read_bytes()
        self.entries.append({"path": rel.as_posix(), "split": self.split, "rows": table.num_rows,
                             "bytes": len(data), "sha256": hashlib.sha256(data).hexdigest()})
        self.part += 1
        self.batch, self.nbytes = [], 0


def summarize(ledger: pa.Table, plan: Plan) -> dict:
    kept = ledger.column("kept").to_pylist()
    reasons = ledger.column("reasons").to_pylist()
    flags = ledger.column("flags").to_pylist()
    stopped = ledger.column("stopped_at").to_pylist()
    split = ledger.column("split").to_pylist()
    checks = ledger.column("checks").to_pylist()
    by_reason: Counter = Counter()
    only_reason: Counter = Counter()
    for r in reasons:
        codes = set(r)
        by_reason.update(codes)
        if len(codes) == 1:
            only_reason.update(codes)
    by_flag: Counter = Counter(c for f in flags for c in set(f))
    by_stage: dict[str, dict[str, int]] = {ps.name: {"checked": 0, "failed": 0, "dropped": 0, "skipped": 0}
                                           for ps in plan.stages}
    for cl in checks:
        seen: dict[str, set[str]] = {}
        for c in cl:
            seen.setdefault(c["stage"], set()).add(c["status"] if c["status"] != "fail" or c["action"] != "drop"
                                                   else "drop")
        for s, statuses in seen.items():
            d = by_stage.setdefault(s, {"checked": 0, "failed": 0, "dropped": 0, "skipped": 0})
            if statuses == {"skipped"}:
                d["skipped"] += 1
                continue
            d["checked"] += 1
            d["failed"] += bool(statuses & {"fail", "drop"})
            d["dropped"] += "drop" in statuses
    n = len(kept)
    k = sum(kept)
    extra = {}
    fit = next((c for cl in checks for c in cl if c["code"] == "agreement_unreliable"), None)
    if fit is not None:
        low = next((c for cl in checks for c in cl if c["code"] == "agreement_low"), None)
        extra["agreement"] = {"fit_auc": fit["value"], "min_fit_auc": fit["threshold"], "reliable": not fit["failed"],
                              "fit_detail": fit["detail"], "threshold": low["threshold"] if low else None,
                              "threshold_detail": low["detail"] if low else None}
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
        "groups": len({g for g in ledger.column("group_id").to_pylist() if g is not None})
        if "group_id" in ledger.column_names else 0,
        "by_bucket": dict(sorted(Counter(b for b in ledger.column("bucket").to_pylist() if b).items()))
        if "bucket" in ledger.column_names else {},
        **extra,
    }
