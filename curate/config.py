"""TOML pipeline config -> validated, typed objects.

One order of precedence everywhere: built-in defaults < pipeline file <
`--set section.key=value`. Each stage's section is a dataclass declared in
the stage's own module; this module only knows how to fill and check them.
"""
from __future__ import annotations

import dataclasses
import hashlib
import json
import math
import tomllib
import types
import typing
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Literal

from .checks import ACTIONS
from .errors import ConfigError


@dataclass
class InputConfig:
    # Input root: a folder, a manifest file (.csv/.jsonl/.parquet), a .tar file or a folder of .tar shards.
    path: str = ""
    # auto | folder | manifest | tar. auto: a file by its extension; a folder holding only .tar files is tar.
    format: Literal["auto", "folder", "manifest", "tar"] = "auto"
    # Manifest column with the image path (relative to the manifest's folder, or absolute).
    image_column: str = "image"
    # Manifest column with the caption text.
    caption_column: str = "caption"
    # Optional manifest column with a stable id; empty: the id is derived from the source path.
    id_column: str = ""
    # Samples per work shard; the unit of parallel work and of resume (common practice: 1k-10k).
    shard_size: int = 500
    # Largest image file read (bytes; larger: file_too_large): 2**28 = uncompressed 8-bit RGB at Pillow's MAX_IMAGE_PIXELS.
    max_file_bytes: int = 1 << 28
    # Follow links and manifest paths that resolve outside the input root (off: they get outside_root; common practice).
    allow_outside_root: bool = False

    def validate(self) -> None:
        if self.shard_size < 1:
            raise ValueError(f"shard_size must be >= 1, got {self.shard_size}")
        if self.max_file_bytes < 1:
            raise ValueError(f"max_file_bytes must be >= 1, got {self.max_file_bytes}")


@dataclass
class RunConfig:
    # Worker processes for per-shard stages and neardup/split search threads; 0 = one per CPU core.
    workers: int = 0
    # local | ray (ray needs the `ray` extra installed).
    engine: Literal["local", "ray"] = "local"
    # Ray cluster address ("auto", "ray://host:10001"); empty starts a private local Ray.
    # On a cluster, --out must be on storage every node can read and write.
    ray_address: str = ""
    # CPUs Ray reserves per shard task; fractions let reads and tasks share small machines.
    ray_task_cpus: float = 1.0
    # Actors that run model stages (embed), each holding the model once; 0 = one per GPU, or one on a
    # CPU-only cluster.
    ray_model_actors: int = 0
    # GPUs per model actor; -1 = 1 when the cluster has GPUs, else 0.
    ray_model_gpus: float = -1
    # CPUs Ray reserves per model actor; a fraction leaves CPUs for the tasks that read shards (on a
    # 2-CPU machine an actor holding every CPU would starve them).
    ray_model_cpus: float = 0.5
    # Modules that register extra stages (docs/stages.md): Python files, relative to this config
    # file, or importable module names. They run as your own code does: list only code you trust.
    plugins: list[str] = field(default_factory=list, metadata={"path": True})

    def validate(self) -> None:
        if self.workers < 0:
            raise ValueError(f"workers must be >= 0 (0 = one per CPU core), got {self.workers}")
        if not self.ray_task_cpus > 0 or not self.ray_model_cpus > 0:
            raise ValueError("ray_task_cpus and ray_model_cpus must be > 0")
        if self.ray_model_actors < 0 or (self.ray_model_gpus < 0 and self.ray_model_gpus != -1):
            raise ValueError("ray_model_actors must be >= 0 and ray_model_gpus >= 0 (or -1 = automatic)")


@dataclass
class DecideConfig:
    # Per reason code (e.g. "pii:email") or code family (e.g. "pii"), override its default action:
    # "drop", "flag" (keep and mark for review), "keep" (ignore), and where the code allows them
    # "quarantine" or "redact".
    actions: dict[str, str] = field(default_factory=dict)

    def validate(self) -> None:
        for code, act in self.actions.items():
            if act not in ACTIONS:
                raise ValueError(f"action {act!r} for {code} is not one of {', '.join(ACTIONS)}")


BUILTIN_SECTIONS: dict[str, type] = {"input": InputConfig, "run": RunConfig, "decide": DecideConfig}


class PipelineConfig:
    """The resolved config: one typed object per section, reachable as attributes."""

    def __init__(self, sections: dict[str, Any], origin: str | None = None):
        self._sections = sections
        self.origin = origin

    def __getattr__(self, name: str) -> Any:
        try:
            return self.__dict__["_sections"][name]
        except KeyError:
            raise AttributeError(name) from None

    def section(self, name: str) -> Any:
        return self._sections[name]

    def names(self) -> list[str]:
        return list(self._sections)

    def to_dict(self) -> dict[str, dict]:
        return {k: dataclasses.asdict(v) for k, v in self._sections.items()}

    def fingerprint(self, *names: str) -> str:
        """A stable hash of the named sections (all when none are named)."""
        d = self.to_dict()
        sel = {k: d[k] for k in (names or sorted(d))}
        return hashlib.sha256(json.dumps(sel, sort_keys=True, default=str).encode()).hexdigest()

    def to_toml(self) -> str:
        return dump_toml(self.to_dict())

    def __reduce__(self) -> tuple:
        # Sections of plugin stages are classes of the plugin modules: a worker process imports the
        # plugins first, then reads the sections.
        import pickle

        run = self._sections.get("run")
        return (_unpickle, (list(getattr(run, "plugins", []) or []), pickle.dumps((self._sections, self.origin))))


def _unpickle(plugin_list: list[str], blob: bytes) -> "PipelineConfig":
    import pickle

    from . import plugins

    plugins.load(plugin_list)
    sections, origin = pickle.loads(blob)
    return PipelineConfig(sections, origin)


def load_config(
    path: str | Path | None,
    sets: list[str] | tuple[str, ...] = (),
    sections: dict[str, type] | None = None,
    *,
    lenient: bool = False,
) -> PipelineConfig:
    """Defaults < file < sets. `sections` maps section name -> dataclass (stages add theirs).

    Relative paths in the file are relative to the file; relative paths given with `sets` (the
    command line) are relative to the working directory. `lenient`: skip sections nobody declared
    (used once, to read `[run] plugins` before the plugins' own sections exist)."""
    all_sections = dict(BUILTIN_SECTIONS)
    all_sections.update(sections or {})
    data: dict[str, Any] = {}
    fname = str(path) if path else None
    if path is not None:
        p = Path(path)
        try:
            data = tomllib.loads(p.read_text(encoding="utf-8"))
        except FileNotFoundError:
            raise ConfigError("config file not found", file=fname) from None
        except IsADirectoryError:
            raise ConfigError("expected a TOML file, got a folder", file=fname) from None
        except (tomllib.TOMLDecodeError, UnicodeDecodeError) as e:
            raise ConfigError(f"not valid TOML ({e})", file=fname) from e
        except OSError as e:
            raise ConfigError(f"cannot be read ({e.strerror or e})", file=fname) from e
    from_file = _copy_tables(data)
    given: dict[str, Any] = {}
    for s in sets:
        _apply_set(data, s)
        _apply_set(given, s)
    built: dict[str, Any] = {}
    for name, cls in all_sections.items():
        raw = data.get(name, {})
        if not isinstance(raw, dict):
            raise ConfigError(f"expected a table [{name}], got {type(raw).__name__}", file=fname, key=name)
        built[name] = _build(cls, raw, name, fname)
    unknown = sorted(set(data) - set(all_sections))
    if unknown and not lenient:
        raise ConfigError(
            f"unknown section; expected one of: {', '.join(sorted(all_sections))}", file=fname, key=unknown[0]
        )
    cfg = PipelineConfig(built, origin=fname)
    if fname:
        _resolve_paths(cfg, from_file, Path(fname).parent, skip=given)
    _resolve_paths(cfg, given, Path.cwd())
    return cfg


def _copy_tables(data: dict) -> dict:
    return {k: (dict(v) if isinstance(v, dict) else v) for k, v in data.items()}


def _resolve_paths(cfg: PipelineConfig, data: dict, base: Path, skip: dict | None = None) -> None:
    """Make relative paths that `data` set absolute against `base` (skipping keys that `skip` overrides).

    Path fields are `input.path` and any dataclass field with metadata {"path": True}; for the latter,
    a value that is not an existing path there (e.g. a pretrained tag like "openai") is left as written.
    """
    skip = skip or {}

    def own(section: str, key: str) -> bool:
        return key in (data.get(section) or {}) and key not in (skip.get(section) or {})

    path = cfg.input.path
    if own("input", "path") and path and "://" not in path and not Path(path).is_absolute():
        cfg.input.path = str((base / cfg.input.path).resolve())
    for name in cfg.names():
        obj = cfg.section(name)
        for f in dataclasses.fields(obj):
            if not f.metadata.get("path") or not own(name, f.name):
                continue
            value = getattr(obj, f.name)

            def fix(v: str) -> str:
                if not v or "://" in v or Path(v).is_absolute():  # URLs and absolute paths stay as given
                    return v
                p = base / v
                return str(p.resolve()) if p.exists() else v

            setattr(obj, f.name, [fix(v) for v in value] if isinstance(value, list) else fix(value))


def _apply_set(data: dict, item: str) -> None:
    if "=" not in item or "." not in item.split("=", 1)[0]:
        raise ConfigError(f"--set expects section.key=value, got {item!r}", key=item)
    key, raw = item.split("=", 1)
    section, name = key.strip().split(".", 1)
    try:
        value = tomllib.loads(f"v = {raw}")["v"]
    except tomllib.TOMLDecodeError:
        value = raw  # a bare word is a string
    data.setdefault(section, {})
    if not isinstance(data[section], dict):
        raise ConfigError("not a table", key=section)
    node = data[section]
    parts = name.split(".")
    for part in parts[:-1]:
        node = node.setdefault(part, {})
    node[parts[-1]] = value


def _build(cls: type, raw: dict, section: str, fname: str | None) -> Any:
    hints = typing.get_type_hints(cls)
    names = {f.name for f in dataclasses.fields(cls)}
    for k in raw:
        if k not in names:
            raise ConfigError(
                f"unknown key; [{section}] accepts: {', '.join(sorted(names))}", file=fname, key=f"{section}.{k}"
            )
    kwargs = {}
    for k, v in raw.items():
        kwargs[k] = _coerce(v, hints[k], fname, f"{section}.{k}")
    obj = cls(**kwargs)
    validate = getattr(obj, "validate", None)
    if validate is not None:
        try:
            validate()
        except ValueError as e:
            raise ConfigError(str(e), file=fname, key=section) from e
    return obj


def _coerce(v: Any, tp: Any, fname: str | None, key: str) -> Any:
    origin = typing.get_origin(tp)
    args = typing.get_args(tp)

    def bad(expected: str) -> ConfigError:
        return ConfigError(f"expected {expected}, got {v!r}", file=fname, key=key)

    if tp is Any:
        return v
    if origin in (typing.Union, types.UnionType):
        if v is None and type(None) in args:
            return None
        real = [a for a in args if a is not type(None)]
        if len(real) == 1:
            return _coerce(v, real[0], fname, key)
        errs = []
        for a in args:
            if a is type(None):
                continue
            try:
                return _coerce(v, a, fname, key)
            except ConfigError as e:
                errs.append(e)
        raise bad(" or ".join(_tname(a) for a in args))
    if origin is Literal:
        if v not in args:
            raise bad("one of " + ", ".join(repr(a) for a in args))
        return v
    if tp is bool:
        if not isinstance(v, bool):
            raise bad("true or false")
        return v
    if tp is int:
        if isinstance(v, bool) or not isinstance(v, int):
            raise bad("an integer")
        return v
    if tp is float:
        if isinstance(v, bool) or not isinstance(v, (int, float)):
            raise bad("a number")
        if not math.isfinite(v):
            raise bad("a finite number")
        return float(v)
    if tp is str:
        if not isinstance(v, str):
            raise bad("a string")
        return v
    if origin in (list, tuple):
        if not isinstance(v, list):
            raise bad("a list")
        inner = args[0] if args else Any
        return [_coerce(x, inner, fname, f"{key}[{i}]") for i, x in enumerate(v)]
    if origin is dict:
        if not isinstance(v, dict):
            raise bad("a table")
        inner = args[1] if len(args) > 1 else Any
        return {str(k): _coerce(x, inner, fname, f"{key}.{k}") for k, x in v.items()}
    return v


def _tname(tp: Any) -> str:
    return getattr(tp, "__name__", str(tp))


def dump_toml(d: dict[str, dict]) -> str:
    """Write a two-level config dict as TOML (enough for our sections)."""
    lines: list[str] = []
    for section, values in d.items():
        lines.append(f"[{section}]")
        for k, v in values.items():
            if v is None:
                lines.append(f"# {k} = (unset)")
                continue
            lines.append(f"{k} = {_toml_value(v)}")
        lines.append("")
    return "\n".join(lines)


def _toml_value(v: Any) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, (int, float)):
        return repr(v)
    if isinstance(v, str):
        return json.dumps(v, ensure_ascii=False)
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(_toml_value(x) for x in v) + "]"
    if isinstance(v, dict):
        return "{" + ", ".join(f"{json.dumps(str(k))} = {_toml_value(x)}" for k, x in v.items()) + "}"
    return json.dumps(str(v))


def field_comments(cls: type) -> dict[str, str]:
    """The `# ...` comment lines written just above each field in a config dataclass's source."""
    import inspect as _inspect

    try:
        src = _inspect.getsource(cls).splitlines()
    except (OSError, TypeError):
        return {}
    out: dict[str, str] = {}
    pending: list[str] = []
    names = {f.name for f in dataclasses.fields(cls)}
    for line in src:
        s = line.strip()
        if s.startswith("#"):
            pending.append(s.lstrip("#").strip())
            continue
        name = s.split(":", 1)[0].strip() if ":" in s else ""
        if name in names and name not in out:
            out[name] = " ".join(pending)
        pending = []
    return out


def commented_template(sections: dict[str, type], values: dict[str, dict] | None = None,
                       header: str = "") -> str:
    """A starter config: every section and key with its default (or given value) and its comment."""
    values = values or {}
    lines = [header] if header else []
    for name, cls in sections.items():
        defaults = dataclasses.asdict(cls())
        given = values.get(name, {})
        comments = field_comments(cls)
        lines.append(f"[{name}]")
        for key, dv in defaults.items():
            v = given.get(key, dv)
            if comments.get(key):
                lines.append(f"# {comments[key]}")
            if v is None:
                lines.append(f"# {key} =")
            else:
                lines.append(f"{key} = {_toml_value(v)}")
        lines.append("")
    return "\n".join(lines)
