"""The package's layering: every module imports on its own, no import cycle, arrows point down.

The import graph is read from the source with Python's own `ast` (imports inside functions
included), so the check does not depend on the order in which a test happened to import things.
"""
from __future__ import annotations

import ast
import subprocess
import sys
from pathlib import Path

import pytest

from conftest import ROOT

PKG = ROOT / "curate"

# Layers, lowest first: a module may import modules of its own layer or below, never above
# (DESIGN: cli -> api -> engines -> plan/stages -> sources, similarity, models, workdir, ledger, config).
LAYERS: list[tuple[str, ...]] = [
    ("curate", "curate.errors", "curate.checks", "curate.progress", "curate.terminal", "curate.clip_tokens",
     "curate.rowfile"),
    ("curate.config", "curate.workdir", "curate.plugins", "curate.layout"),
    ("curate.sources", "curate.imaging", "curate.similarity", "curate.models", "curate.pii",
     "curate.ledger", "curate.report", "curate.probes"),
    ("curate.stages", "curate.imagesets"),
    ("curate.decide",),
    ("curate.plan", "curate.execute"),
    ("curate.engines",),
    ("curate.writers",),
    ("curate.runner", "curate.leakcheck"),
    ("curate.api",),
    ("curate.cli",),
]


def _modules() -> dict[str, Path]:
    out = {}
    for p in sorted(PKG.rglob("*.py")):
        parts = list(p.relative_to(ROOT).with_suffix("").parts)
        if parts[-1] == "__init__":
            parts = parts[:-1]
        out[".".join(parts)] = p
    return out


def _resolve(mod: str, is_pkg: bool, node: ast.ImportFrom) -> str:
    if node.level == 0:
        return node.module or ""
    base = mod.split(".") if is_pkg else mod.split(".")[:-1]
    base = base[: len(base) - (node.level - 1)]
    return ".".join(base + ([node.module] if node.module else []))


def _graph() -> dict[str, set[str]]:
    mods = _modules()
    graph: dict[str, set[str]] = {m: set() for m in mods}
    for mod, path in mods.items():
        is_pkg = path.name == "__init__.py"
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            targets = []
            if isinstance(node, ast.Import):
                targets = [a.name for a in node.names]
            elif isinstance(node, ast.ImportFrom):
                base = _resolve(mod, is_pkg, node)
                targets = [f"{base}.{a.name}" if f"{base}.{a.name}" in mods else base for a in node.names]
            for t in targets:
                while t and t not in mods:
                    t = t.rpartition(".")[0]
                if t and t != mod and t.startswith("curate"):
                    graph[mod].add(t)
    return graph


def _layer(mod: str) -> int:
    best = None
    for i, names in enumerate(LAYERS):
        for n in names:
            if (mod == n or mod.startswith(n + ".")) and (best is None or len(n) > best[1]):
                best = (i, len(n))
    assert best is not None, f"{mod} has no layer in tests/test_imports.py: add it"
    return best[0]


def test_no_import_cycle():
    graph = _graph()
    index: dict[str, int] = {}
    low: dict[str, int] = {}
    stack: list[str] = []
    on: set[str] = set()
    cycles: list[list[str]] = []
    counter = [0]

    def visit(v: str) -> None:  # Tarjan's strongly connected components
        index[v] = low[v] = counter[0]
        counter[0] += 1
        stack.append(v)
        on.add(v)
        for w in graph[v]:
            if w not in index:
                visit(w)
                low[v] = min(low[v], low[w])
            elif w in on:
                low[v] = min(low[v], index[w])
        if low[v] == index[v]:
            comp = []
            while True:
                w = stack.pop()
                on.discard(w)
                comp.append(w)
                if w == v:
                    break
            if len(comp) > 1:
                cycles.append(sorted(comp))

    sys.setrecursionlimit(10_000)
    for v in graph:
        if v not in index:
            visit(v)
    assert not cycles, cycles


def test_arrows_point_down():
    graph = _graph()
    up = [(a, b) for a, targets in graph.items() for b in targets
          if _layer(b) > _layer(a) and not (a.startswith("curate.stages") and b == "curate.stages")]
    assert not up, up


def test_every_module_imports_on_its_own():
    mods = sorted(_modules())
    procs = {}
    failures = []
    for i in range(0, len(mods), 8):
        for m in mods[i:i + 8]:
            procs[m] = subprocess.Popen([sys.executable, "-c", f"import {m}"], cwd=ROOT, stdout=subprocess.PIPE,
                                        stderr=subprocess.PIPE, text=True)
        for m in mods[i:i + 8]:
            _, err = procs[m].communicate(timeout=300)
            if procs[m].returncode != 0:
                failures.append((m, err.strip().splitlines()[-1:]))
    assert not failures, failures


@pytest.mark.parametrize("mod", ["curate.stages.inspect", "curate.stages.caption", "curate.plan", "curate.api"])
def test_heavy_libraries_load_only_where_used(mod):
    # STYLE: torch, open_clip, faiss, ray and matplotlib are imported inside the code that needs them.
    code = (f"import sys, {mod}\n"
            "print(sorted(m for m in ('torch', 'open_clip', 'faiss', 'ray', 'matplotlib') if m in sys.modules))")
    out = subprocess.run([sys.executable, "-c", code], cwd=ROOT, capture_output=True, text=True, timeout=300)
    assert out.returncode == 0, out.stderr
    assert out.stdout.strip() == "[]"
