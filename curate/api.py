"""The library entry points; the CLI mirrors them one to one (same parameter names)."""
from __future__ import annotations

import errno
import json
import os
from pathlib import Path
from typing import Any

from .config import PipelineConfig, commented_template, load_config
from .errors import ConfigError, InputError, OutputError


def load(config: str | Path | None, *, input: str | None = None, sets: tuple[str, ...] | list[str] = (),
         engine: str | None = None, eval_sets: list[str] | None = None,
         decisions: str | Path | None = None) -> PipelineConfig:
    """Resolve a pipeline config: defaults < file < sets < explicit arguments."""
    from . import plugins
    from .plan import config_sections

    first = load_config(config, sets, config_sections(), lenient=True)
    plugins.load(first.run.plugins)
    cfg = load_config(config, sets, config_sections())
    from .sources.stores import is_url

    if input is not None:
        cfg.input.path = input_path(input)
    elif is_url(cfg.input.path):
        cfg.input.path = input_path(cfg.input.path)
    if eval_sets:
        cfg.split.eval_sets = list(cfg.split.eval_sets) + [input_path(p) for p in eval_sets]
    if decisions is not None:
        if not Path(decisions).is_file():
            raise ConfigError(f"decisions file {decisions} not found", key="review.decisions")
        cfg.review.decisions = str(Path(decisions).resolve())
    if engine is not None:
        if engine not in ("local", "ray"):
            raise ConfigError(f"expected engine local or ray, got {engine!r}", key="run.engine")
        cfg.run.engine = engine
    if not cfg.input.path:
        raise ConfigError("no input: set [input] path in the config or pass --input", file=cfg.origin,
                          key="input.path")
    if not is_url(cfg.input.path) and not Path(cfg.input.path).exists():
        raise InputError(f"input root {cfg.input.path} does not exist")
    return cfg


def input_path(path: str) -> str:
    """An input or image-set path as the library takes it: a local path made absolute (a
    `file://` URL becomes its local path), any other URL (s3://, gs://, memory://, ...) as given."""
    from .sources.stores import local_path

    local = local_path(str(path))
    return str(path) if local is None else str(Path(local).resolve())


def output_path(out: str | Path) -> Path:
    """The --out folder as a local path; a `file://` URL is its local path. Raises OutputError for
    any other URL: the work folder needs atomic renames and a file lock, which object stores lack."""
    from .sources.stores import is_url, local_path

    text = str(out)
    local = local_path(text) if is_url(text) else text
    if local is None:
        raise OutputError(f"--out {text}: must be a local folder (or a file:// URL): the work files are written "
                          "by atomic rename under a file lock, which object stores do not offer; write to a local "
                          "folder and copy the finished output to the store")
    return Path(local)


def run(config: str | Path | None, *, out: str | Path, input: str | None = None,
        sets: tuple[str, ...] | list[str] = (), engine: str | None = None, eval_sets: list[str] | None = None,
        decisions: str | Path | None = None, progress: Any = None) -> Any:
    """Run the whole pipeline; returns a runner.RunResult. Outputs land in `out`.

    eval_sets: outside evaluation sets; training candidates that near-duplicate them are dropped.
    decisions: a reviewer's keep/drop decisions (CSV or JSONL), applied over the checks."""
    from .runner import run_pipeline

    out = output_path(out)
    cfg = load(config, input=input, sets=sets, engine=engine, eval_sets=eval_sets, decisions=decisions)
    check_output_dir(out)
    try:
        return run_pipeline(cfg, out, progress=progress)
    except OSError as e:
        if e.errno in _OUTPUT_ERRNOS:
            where = e.filename or out
            raise OutputError(f"cannot write {where}: {e.strerror or e}; free space or choose another --out") from e
        raise


# errno values that mean the output cannot be written (full disk, quota, read-only, permissions).
_OUTPUT_ERRNOS = {errno.ENOSPC, errno.EDQUOT, errno.EROFS, errno.EACCES, errno.EPERM}


def check_output_dir(out: Path) -> None:
    """Refuse an --out that is a file, or that cannot be created or written, before any work."""
    if out.exists() and not out.is_dir():
        raise OutputError(f"--out {out} is an existing file; give a folder")
    probe = out
    while not probe.exists():
        probe = probe.parent
    if not probe.is_dir():
        raise OutputError(f"--out {out}: {probe} is a file, not a folder")
    if not os.access(probe, os.W_OK | os.X_OK):
        raise OutputError(f"--out {out}: {probe} is not writable")


def explain(out: str | Path, sample: str) -> dict:
    """Every check of one sample (by sample_id or source), with value, threshold and verdict."""
    from .ledger import explain as _explain
    from .stages import all_checks

    return _explain(out, sample, {code: spec.help for code, spec in all_checks().items()})


def ledger(out: str | Path, *, reason: str | None = None, flag: str | None = None, kept: bool | None = None,
           split: str | None = None, columns: list[str] | None = None, format: str | None = None,
           limit: int | None = None) -> Any:
    """Ledger rows matching every filter given (see curate.ledger.query): a curate.ledger.Query, or,
    with format (table, csv or json), its text. A table shows 50 rows unless limit says otherwise."""
    from . import ledger as _ledger

    if format is not None and format not in _ledger.FORMATS:
        raise InputError(f"unknown format {format!r}; use one of {', '.join(_ledger.FORMATS)}")
    if limit is None and format == "table":
        limit = _ledger.TABLE_LIMIT
    q = _ledger.query(out, reason=reason, flag=flag, kept=kept, split=split, columns=columns, limit=limit)
    return q if format is None else _ledger.format_query(q, format)


def review(run_dir: str | Path, *, reason: str | None = None, flag: str | None = None, group: bool = False,
           limit: int | None = None, out: str | Path) -> dict:
    """Write a pre-filled decisions file (`out`: .csv or .jsonl) and its HTML contact sheet (.html)."""
    from .report.review import LIMIT
    from .report.review import review as _review

    return _review(run_dir, reason=reason, flag=flag, group=group, limit=LIMIT if limit is None else limit, out=out)


def status(out: str | Path) -> dict:
    """Each stage's state in an output directory: ran, reused, seconds; whether a run holds the lock."""
    from .workdir import RunLock

    out = Path(out)
    state_path = out / "work" / "state.json"
    if not out.exists():
        raise InputError(f"{out} does not exist")
    state = json.loads(state_path.read_text()) if state_path.exists() else {"stages": {}, "finished": False}
    state["running"] = RunLock(out).held()
    state["outputs"] = {name: (out / name).exists() for name in
                        ("ledger.parquet", "manifest.json", "summary.json", "report.html", "shards")}
    return state


# Starter configs `curate init --preset` writes (pipelines/*.toml are these, regenerated by a test).
PRESETS: dict[str, dict[str, dict]] = {
    # A scraped web corpus for base training: the built-in defaults.
    "default": {},
    # A small in-house fine-tune set trained at 512 px: SD v1 model card (>= 512x512 kept).
    "finetune": {
        "inspect": {"min_short_side": 512, "min_pixels": 262_144},
        "input": {"shard_size": 200},
    },
}


def init(path: str | Path, *, preset: str = "default", force: bool = False) -> Path:
    """Write a commented starter config (every section and key, with defaults and their sources)."""
    from .config import BUILTIN_SECTIONS
    from .plan import config_sections

    if preset not in PRESETS:
        raise ConfigError(f"unknown preset {preset!r}; choose one of {', '.join(PRESETS)}", key="preset")
    p = Path(path)
    if p.exists() and not force:
        raise InputError(f"{p} exists; pass --force to overwrite")
    sections = dict(BUILTIN_SECTIONS)
    sections.update(config_sections())
    values = PRESETS[preset]
    header = (f"# curate pipeline config (preset: {preset}). Precedence: built-in defaults < this file < --set.\n"
              "# Every key is shown with its default and where that default comes from.\n")
    p.parent.mkdir(parents=True, exist_ok=True)
    p.write_text(commented_template(sections, values, header), encoding="utf-8")
    load_config(p, (), config_sections())  # what we write must load
    return p


def leakcheck(a: str | Path, b: str | Path, *, radius: int | None = None, semantic: float = 0.0,
              model: str = "", pretrained: str = "", config: str | Path | None = None,
              html: str | Path | None = None, cache_dir: str | Path | None = None, workers: int = 1) -> dict:
    """Near-duplicate pairs across two image sets (folders, manifests, tar or shard sets, outputs)."""
    from .leakcheck import leakcheck as _leakcheck

    return _leakcheck(a, b, radius=radius, semantic=semantic, model=model, pretrained=pretrained, config=config,
                      html=html, cache_dir=cache_dir, workers=workers)


def probe_train(run_dir: str | Path, *, labels: str | Path, name: str, out: str | Path | None = None,
                target_precision: float | None = None, text: bool = False) -> dict:
    """Train a probe (`probe:<name>`) on a finished run's CLIP embeddings from a labels file (CSV or JSONL:
    sample_id or source, label 0|1); writes `out` (default DIR/probes/NAME.safetensors) and its JSON sidecar,
    and returns the sidecar with `path` and `sidecar`. target_precision: None = curate.probes.TARGET_PRECISION."""
    from .probes import TARGET_PRECISION, train

    return train(run_dir, labels=labels, name=name, out=out, text=text,
                 target_precision=TARGET_PRECISION if target_precision is None else target_precision)
