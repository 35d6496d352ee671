"""Growing a corpus: re-run time after appending 1, 10 and 100 images, against a full run.

Builds an N-image corpus (default 2,000) of independent rendered scenes with captions, runs the
default pipeline on it with the demo CLIP model, then, in the same process and work dir, appends
1, 10 and 100 new images (cumulatively) and re-runs after each. Every re-run reports, per stage,
samples computed and reused (`curate status --json`), so the O(k) claim is checked beside the
times. `--engine both` also times a full run of the same corpus on the local engine and on Ray
(a local Ray instance on this machine), fresh work dir each.

    .venv/bin/python bench/grow.py                  # 2,000 images, appends 1/10/100
    .venv/bin/python bench/grow.py --n 300 --engine both --json

Times are wall seconds on this machine as it is; run it idle (`uptime`) and compare ratios
within one run.
"""
from __future__ import annotations

import argparse
import json
import os
import random
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "sample_corpus"))

SETS = ['embed.model="demo"', 'embed.pretrained=""']


def write_images(folder: Path, start: int, count: int, seed: int) -> None:
    """`count` rendered scenes (JPEG, 400-640 px) with sidecar captions, named from `start`."""
    import workshop

    folder.mkdir(parents=True, exist_ok=True)
    for i in range(start, start + count):
        r = random.Random(seed * 1_000_003 + i)
        spec = workshop.random_spec(r)
        img = workshop.render(spec, r.choice(((640, 480), (512, 512), (480, 640), (600, 400))), r)
        stem = folder / f"g{i:06d}"
        img.save(stem.with_suffix(".jpg"), quality=88)
        stem.with_suffix(".txt").write_text(workshop.describe(spec, r), encoding="utf-8")


def timed_run(corpus: Path, out: Path, engine: str = "local") -> dict:
    from curate import api

    t0 = time.perf_counter()
    api.run(None, input=str(corpus), out=str(out), sets=SETS + [f'run.engine="{engine}"'])
    secs = time.perf_counter() - t0
    st = api.status(out)["stages"]
    work = {k: (v.get("samples_computed"), v.get("samples_reused")) for k, v in st.items()
            if k in ("inspect", "hashes", "quality", "embed")}
    return {"seconds": round(secs, 2), "computed_reused": work}


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--n", type=int, default=2000, help="images in the starting corpus")
    ap.add_argument("--appends", default="1,10,100", help="images appended before each re-run")
    ap.add_argument("--engine", choices=("local", "both"), default="local",
                    help="'both' also times a full run on Ray")
    ap.add_argument("--json", action="store_true", help="print one JSON object")
    args = ap.parse_args(argv)
    results: dict = {"n": args.n, "load_avg": os.getloadavg()}
    with tempfile.TemporaryDirectory(prefix="curate-grow-") as tmp:
        corpus, out = Path(tmp) / "corpus", Path(tmp) / "out"
        write_images(corpus, 0, args.n, seed=1)
        results["full"] = timed_run(corpus, out)
        results["appends"] = []
        added = 0
        for k in (int(x) for x in args.appends.split(",") if x):
            write_images(corpus / "new", args.n + added, k, seed=2)
            added += k
            res = timed_run(corpus, out)
            res["appended"] = k
            res["ratio_to_full"] = round(res["seconds"] / results["full"]["seconds"], 3)
            results["appends"].append(res)
        if args.engine == "both":
            small = Path(tmp) / "small"
            write_images(small, 0, min(args.n, 400), seed=3)
            results["engines"] = {e: timed_run(small, Path(tmp) / f"out-{e}", e)["seconds"]
                                  for e in ("local", "ray")}
    if args.json:
        print(json.dumps(results))
        return 0
    print(f"full run of {args.n} images: {results['full']['seconds']} s  {results['full']['computed_reused']}")
    for r in results["appends"]:
        print(f"+{r['appended']:>4} images: {r['seconds']:>7} s  ({r['ratio_to_full']:.3f} of full)  "
              f"computed/reused {r['computed_reused']}")
    if "engines" in results:
        e = results["engines"]
        print(f"full run, local engine {e['local']} s, ray engine {e['ray']} s")
    print(f"load average at start: {results['load_avg']}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
