"""Listing memory: peak RSS and seconds of `iter_samples` on synthetic inputs of N rows.

Two inputs per N, built in a temporary folder:
- manifest: a CSV of N rows (image path, a ~60-character caption, one extra column); the images
  do not exist, so each row costs a failed stat and is listed as `unreadable`;
- folder: N empty `.jpg` files with a `.txt` sidecar each, 1,000 per sub-folder (`--per-folder`;
  0 puts them all in one folder, whose listing is then held whole).

Each listing runs in a fresh Python process that consumes the batches and drops them. Printed per
run: rows, seconds, peak RSS, the RSS before listing (interpreter + imports), their difference
(what listing used), and the largest size the exact duplicate check (SeenIds, 8 bytes per input)
reached, which is the only part meant to grow with N. `--table` also runs `list_samples` (one
in-memory table, sorted) for contrast. `--set-cost` measures bytes per entry of a Python set of
16-byte digests against SeenIds.

    .venv/bin/python bench/listing_memory.py                      # N = 10k, 100k, 1M manifest; folder to 100k
    .venv/bin/python bench/listing_memory.py --sizes 10000 --folder-sizes 10000 --json
"""
from __future__ import annotations

import argparse
import json
import os
import resource
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def build_manifest(path: Path, n: int) -> None:
    with open(path, "w", encoding="utf-8") as f:
        f.write("image,caption,batch\n")
        for i in range(n):
            f.write(f"imgs/{i // 1000:05d}/{i:09d}.jpg,a glazed stoneware bowl photographed on linen number {i},"
                    f"{i % 97}\n")


def build_folder(root: Path, n: int, per_folder: int = 1000) -> None:
    for i in range(n):
        d = root / f"{i // per_folder:05d}" if per_folder else root
        if i % (per_folder or n) == 0:
            d.mkdir(parents=True, exist_ok=True)
        (d / f"{i:09d}.jpg").touch()
        (d / f"{i:09d}.txt").write_text(f"a glazed bowl number {i}")


def _rss_kb() -> int:
    with open("/proc/self/status") as f:
        for line in f:
            if line.startswith("VmRSS:"):
                return int(line.split()[1])
    return 0


def child(path: str, batch_rows: int, table: bool) -> dict:
    """Runs inside the fresh process: list `path`, report figures."""
    sys.path.insert(0, str(ROOT))
    from curate.config import InputConfig
    from curate.sources import iter_samples, list_samples
    from curate.sources.common import SeenIds

    peak_seen = [0]
    real_add = SeenIds.add

    def add(self, ids):
        out = real_add(self, ids)
        peak_seen[0] = max(peak_seen[0], self.nbytes)
        return out

    SeenIds.add = add
    before = _rss_kb()
    t0 = time.perf_counter()
    rows = 0
    if table:
        rows = list_samples(InputConfig(path=path)).num_rows
    else:
        for batch in iter_samples(InputConfig(path=path), batch_rows=batch_rows):
            rows += batch.num_rows
            del batch
    secs = time.perf_counter() - t0
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss  # KiB on Linux
    return {"rows": rows, "seconds": round(secs, 2), "peak_rss_mb": round(peak / 1024, 1),
            "base_rss_mb": round(before / 1024, 1), "listing_mb": round((peak - before) / 1024, 1),
            "seen_ids_mb": round(peak_seen[0] / 2**20, 1)}


def set_cost(n: int) -> dict:
    """Bytes per entry: a Python set of 16-byte digests vs SeenIds (numpy sorted runs)."""
    import hashlib

    import numpy as np

    sys.path.insert(0, str(ROOT))
    from curate.sources.common import SeenIds

    def rss() -> int:
        return _rss_kb() * 1024

    base = rss()
    s = {hashlib.sha256(i.to_bytes(8, "little")).digest()[:16] for i in range(n)}
    py = rss() - base
    del s
    base = rss()
    seen = SeenIds()
    rng = np.random.default_rng(0)
    for _ in range(0, n, 65536):
        seen.add(rng.integers(0, 2**63, 65536, dtype=np.uint64))
    npy = rss() - base
    return {"n": n, "python_set_bytes_per_entry": round(py / n, 1),
            "seen_ids_bytes_per_entry": round(npy / len(seen), 1), "seen_ids_nbytes_per_entry": seen.nbytes / len(seen)}


def run_child(args: list[str]) -> dict:
    out = subprocess.run([sys.executable, __file__, *args], capture_output=True, text=True, check=True)
    return json.loads(out.stdout.strip().splitlines()[-1])


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--sizes", default="10000,100000,1000000", help="manifest rows, comma separated")
    ap.add_argument("--folder-sizes", default="10000,100000", help="folder files, comma separated")
    ap.add_argument("--batch-rows", type=int, default=65536)
    ap.add_argument("--per-folder", type=int, default=1000, help="files per sub-folder (0: all in one folder)")
    ap.add_argument("--table", action="store_true", help="also run list_samples (in-memory table) for contrast")
    ap.add_argument("--set-cost", type=int, default=1_000_000, help="entries for the set cost figure (0: skip)")
    ap.add_argument("--json", action="store_true", help="one JSON line per run")
    ap.add_argument("--child", nargs=3, metavar=("PATH", "BATCH", "TABLE"), help=argparse.SUPPRESS)
    ap.add_argument("--child-set-cost", type=int, help=argparse.SUPPRESS)
    a = ap.parse_args()
    if a.child:
        print(json.dumps(child(a.child[0], int(a.child[1]), a.child[2] == "1")))
        return
    if a.child_set_cost:
        print(json.dumps(set_cost(a.child_set_cost)))
        return
    work = Path(tempfile.mkdtemp(prefix="listing-bench-"))
    try:
        plan = [("manifest", int(n)) for n in a.sizes.split(",") if n] + \
               [("folder", int(n)) for n in a.folder_sizes.split(",") if n]
        if not a.json:
            print(f"batch_rows={a.batch_rows}; RSS in MiB; listing = peak - before; seen_ids = exact duplicate "
                  "check (8 B/input)")
            print(f"{'input':<9}{'api':<13}{'rows':>9}{'seconds':>9}{'peak':>8}{'before':>8}{'listing':>9}"
                  f"{'seen_ids':>10}")
        for kind, n in plan:
            t0 = time.perf_counter()
            if kind == "manifest":
                path = work / f"m{n}.csv"
                build_manifest(path, n)
            else:
                path = work / f"f{n}"
                build_folder(path, n, a.per_folder)
            built = time.perf_counter() - t0
            apis = ["iter_samples"] + (["list_samples"] if a.table else [])
            for api in apis:
                res = run_child(["--child", str(path), str(a.batch_rows), "1" if api == "list_samples" else "0"])
                res.update({"input": kind, "api": api, "n": n, "build_seconds": round(built, 1)})
                if a.json:
                    print(json.dumps(res), flush=True)
                else:
                    print(f"{kind:<9}{api:<13}{res['rows']:>9}{res['seconds']:>9.1f}{res['peak_rss_mb']:>8.0f}"
                          f"{res['base_rss_mb']:>8.0f}{res['listing_mb']:>9.0f}{res['seen_ids_mb']:>10.1f}",
                          flush=True)
            if path.is_dir():
                shutil.rmtree(path)
            else:
                os.unlink(path)
        if a.set_cost:
            res = run_child(["--child-set-cost", str(a.set_cost)])
            if a.json:
                print(json.dumps({"set_cost": res}))
            else:
                print(f"exact seen-id set, {res['n']} entries: Python set of 16-byte digests "
                      f"{res['python_set_bytes_per_entry']} B/entry; SeenIds {res['seen_ids_bytes_per_entry']} B/entry "
                      f"(arrays alone {res['seen_ids_nbytes_per_entry']:.0f})")
    finally:
        shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    main()
