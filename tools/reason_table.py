"""Print the README's reason-code table from the registered stages (paste it into README.md).

    .venv/bin/python tools/reason_table.py
"""
from __future__ import annotations

from curate.stages import REGISTRY

SHARD_WRITER = [("source_changed", "pack", "drop", ("drop",),
                 "the image's bytes changed after it was inspected, so it was not packed")]


def rows() -> list[str]:
    out = []
    for st in REGISTRY.values():
        for c in st.checks:
            code = {"pii": "pii:<kind>", "term": "term:<list>", "concept": "concept:<name>",
                    "probe": "probe:<name>"}.get(c.code, c.code)
            if c.code == "source_changed":
                continue
            drop = f" (drops as `risk:{code}`)" if c.risk else ""
            out.append(f"| `{code}` | {st.name} | {c.action} | {', '.join(c.allowed)} | {c.help}{drop} |")
    for code, stage, action, allowed, help in SHARD_WRITER:
        out.append(f"| `{code}` | {stage} | {action} | {', '.join(allowed)} | {help} |")
    return out


if __name__ == "__main__":
    print("| code | stage | default action | allowed actions | meaning |\n|---|---|---|---|---|")
    print("\n".join(rows()))
