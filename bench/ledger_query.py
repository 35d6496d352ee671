"""`curate ledger` at scale: time per query on a synthetic N-row ledger written as Parquet.

The ledger is bench/report_scale.py's invented one (written once to a temporary folder with
zstd, as the pipeline writes it). Each query runs through curate.api.ledger exactly as the
command does (read the needed columns, filter with Arrow kernels, format); times are the best
of --repeat runs, since the machine is shared and the minimum is the least noisy estimate.

    .venv/bin/python bench/ledger_query.py --n 1000000 --json
prints one JSON line: rows, ledger_bytes, and seconds per query name.
"""
from __future__ import annotations

import argparse
import json
import sys
import tempfile
import time
from pathlib import Path

import pyarrow.parquet as pq

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(Path(__file__).resolve().parent))

from report_scale import synthetic_ledger  # noqa: E402

from curate import api  # noqa: E402

QUERIES = {
    "count_reason": dict(reason="agreement_low", format="table", limit=0),
    "reason_table_50": dict(reason="agreement_low", format="table"),
    "flag_family_csv_all": dict(flag="pii", format="csv"),
    "dropped_eval_none": dict(kept=False, split="none", format="table", limit=20),
    "kept_eval_json_1000": dict(kept=True, split="eval", columns=["sample_id", "source", "agreement"],
                                format="json", limit=1000),
    "reason_and_flag": dict(reason="image_blurred", flag="caption_many_tokens", format="csv"),
    "quarantine_checks_json_100": dict(split="quarantine", columns=["sample_id", "checks"], format="json",
                                       limit=100),
}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=1_000_000)
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--row-group-size", type=int, default=0,
                    help="rows per Parquet row group; 0 = pyarrow's default (one group up to ~1M rows, as the "
                         "pipeline writes the ledger today). Smaller groups let a query read only the groups "
                         "that hold the rows it prints.")
    ap.add_argument("--json", action="store_true")
    a = ap.parse_args()
    with tempfile.TemporaryDirectory() as d:
        kw = {"row_group_size": a.row_group_size} if a.row_group_size else {}
        pq.write_table(synthetic_ledger(a.n), Path(d) / "ledger.parquet", compression="zstd", **kw)
        res: dict = {"rows": a.n, "row_group_size": a.row_group_size or "default",
                     "ledger_bytes": (Path(d) / "ledger.parquet").stat().st_size, "seconds": {}, "matched": {}}
        for name, kw in QUERIES.items():
            best = float("inf")
            for _ in range(a.repeat):
                t = time.perf_counter()
                text = api.ledger(d, **kw)
                best = min(best, time.perf_counter() - t)
            res["seconds"][name] = round(best, 3)
            q = api.ledger(d, **{k: v for k, v in kw.items() if k not in ("format", "limit")}, limit=0)
            res["matched"][name] = q.matched
            del text
    if a.json:
        print(json.dumps(res))
    else:
        print(f"{a.n:,} rows, ledger {res['ledger_bytes'] / 1e6:.1f} MB, row groups: {res['row_group_size']}")
        for name, s in res["seconds"].items():
            print(f"  {name:<28}{s:8.3f} s  ({res['matched'][name]:,} match)")


if __name__ == "__main__":
    main()
