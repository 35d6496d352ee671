"""Stages from outside the package: modules named in `[run] plugins`, imported before the plan is built.

Each entry is a Python file (a relative path is relative to the pipeline file) or an importable
module name. Importing it registers its stages. Worker processes import the same list before they
run a task, so a plugin stage runs wherever the built-in ones do.
"""
from __future__ import annotations

import hashlib
import importlib
import importlib.util
import sys
from pathlib import Path

from .errors import ConfigError

_LOADED: dict[str, str] = {}  # entry as resolved -> module name


def load(entries: list[str] | tuple[str, ...]) -> None:
    """Import every plugin module once per process. ConfigError when one cannot be imported."""
    for entry in entries:
        if entry in _LOADED:
            continue
        try:
            if entry.endswith(".py"):
                path = Path(entry)
                if not path.is_file():
                    raise ConfigError(f"plugin file {entry} not found", key="run.plugins")
                digest = hashlib.sha256(str(path.resolve()).encode("utf-8", "surrogateescape")).hexdigest()[:12]
                name = f"curate_plugin_{path.stem}_{digest}"
                spec = importlib.util.spec_from_file_location(name, path)
                module = importlib.util.module_from_spec(spec)
                sys.modules[name] = module
                spec.loader.exec_module(module)
            else:
                name = entry
                importlib.import_module(entry)
        except ConfigError:
            raise
        except Exception as e:  # noqa: BLE001 - any failure of the user's module is a config error
            sys.modules.pop(locals().get("name", ""), None)
            raise ConfigError(f"plugin {entry} cannot be imported: {type(e).__name__}: {e}",
                              key="run.plugins") from e
        _LOADED[entry] = name
