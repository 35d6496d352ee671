"""Thin CLI: one command per user task; each parses, calls curate.api, maps errors to exit codes.

Exit codes: 0 done; 1 finished but a check failed (e.g. leaks found);
2 bad usage, bad config or unreadable input; 3 a stage failed on a whole shard.
"""
from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path
from typing import Any

from . import __version__
from .errors import CurateError
from .terminal import escape as _e
from .terminal import log_to_stderr


def _cmd_run(a: argparse.Namespace) -> int:
    from . import api
    from .progress import BarProgress, NullProgress

    progress = BarProgress() if (not a.quiet and sys.stderr.isatty()) else NullProgress()
    res = api.run(a.config, out=a.out, input=a.input, sets=a.set, engine=a.engine, eval_sets=a.eval_set,
                  decisions=a.decisions, progress=progress)
    summary = json.loads((Path(res.out_dir) / "summary.json").read_text())
    if a.json:
        print(json.dumps({"out": res.out_dir, "summary": summary, "ran": res.ran, "reused": res.reused}))
        return 0
    print(f"curate {__version__}: {res.samples} samples in {res.shards} shard(s)")
    for names, kind, secs in res.passes:
        ran, reused = res.ran.get(names[0], 0), res.reused.get(names[0], 0)
        what = f"computed {ran}, reused {reused} shard(s)" if kind == "shard" else ("computed" if ran else "reused")
        label = _e(", ".join(names))
        print(f"  {label:<32}{secs:7.2f}s  {what}")
    print(f"  {'outputs':<32}{res.seconds.get('pack', 0.0):7.2f}s  ledger, shards, manifest, summary, report")
    print(f"kept {summary['kept']} of {summary['samples']} ({100 * summary['kept_fraction']:.1f}%)")
    if summary.get("agreement", {}).get("fit_auc") is not None:
        ag = summary["agreement"]
        verdict = "applied" if ag["reliable"] else f"NOT applied (below {ag['min_fit_auc']:g}): model out of its depth"
        thr = f", threshold {ag['threshold']:.3f}" if ag["reliable"] and ag["threshold"] is not None else ""
        print(f"agreement: model fit on this corpus ROC AUC {ag['fit_auc']:.3f} (true vs shuffled captions); "
              f"{verdict}{thr}")
    if summary["by_reason"]:
        print("drops by reason (a sample may have several):")
        for code, n in summary["by_reason"].items():
            print(f"  {_e(code):<22} {n}")
    if summary["by_flag"]:
        print("flags (for human review):")
        for code, n in summary["by_flag"].items():
            print(f"  {_e(code):<22} {n}")
    if summary.get("by_split"):
        print("split: " + ", ".join(f"{k} {v}" for k, v in sorted(summary["by_split"].items())))
    out = _e(res.out_dir)
    print(f"shards:   {out}/shards/\nledger:   {out}/ledger.parquet\nsummary:  {out}/summary.json\n"
          f"report:   {out}/report.html")
    if res.cleared_stale_lock:
        print("note: cleared a stale lock left by a killed run")
    return 0


def _cmd_explain(a: argparse.Namespace) -> int:
    from . import api

    info = api.explain(a.out, a.sample)
    if a.json:
        print(json.dumps(info, default=str))
        return 0
    verdict = "KEPT" if info["kept"] else "DROPPED"
    print(f"sample  {_e(info['sample_id'])}  {_e(info['source'])}")
    print(f"caption {_short(info['caption'], 100)!s}")
    print(f"size    {info['width']}x{info['height']}  format {_e(info['format'])}  bytes {info['file_bytes']}")
    print(f"verdict {verdict}" + (f"  reasons: {_e(', '.join(info['reasons']))}" if info["reasons"] else "")
          + (f"  flags: {_e(', '.join(info['flags']))}" if info["flags"] else ""))
    if info.get("split"):
        print(f"split   {_e(info['split'])}")
    print()
    print(f"{'stage':<16}{'check':<22}{'value':<30}{'passes when':<18}verdict")
    for c in info["checks"]:
        v = c["status"]
        if c["status"] == "fail":
            v += f" -> {c['action']}"
        value = c["value_text"] if c["value"] is None or not c["detail"] else f"{c['value_text']} ({c['detail']})"
        print(f"{_e(c['stage']):<16}{_short(c['code'], 21):<22}{_short(value, 29):<30}"
              f"{_short(c['condition'], 17):<18}{v}")
    if info["group"]:
        print(f"\nnear-duplicate group {_e(info['group_id'])} ({len(info['group'])} members):")
        for m in info["group"]:
            mark = "kept   " if m["kept"] else "dropped"
            how = f" ({m['dup_transform']})" if m.get("dup_transform") else ""
            d = "" if m["dup_of"] is None else (f" copy of {m['dup_of']} by {m['dup_signal']}{how} at "
                                                f"{m['dup_distance']:g}"
                                                + (f"; kept copy wins on {m['keep_reason']}" if m.get("keep_reason")
                                                   else ""))
            print(f"  {mark} {_e(m['sample_id'])} {_e(m['source'])} {m['width']}x{m['height']}{_e(d)}")
    return 0


def _short(v: Any, n: int) -> str:
    s = "" if v is None else _e(v)
    return s if len(s) <= n else s[: n - 1] + "…"


def _cmd_ledger(a: argparse.Namespace) -> int:
    from . import api

    sys.stdout.write(api.ledger(a.out, reason=a.reason, flag=a.flag, kept=a.kept, split=a.split, columns=a.columns,
                                format=a.format, limit=a.limit))
    return 0


def _cmd_review(a: argparse.Namespace) -> int:
    from . import api

    res = api.review(a.run_dir, reason=a.reason, flag=a.flag, group=a.group, limit=a.limit, out=a.out)
    print(f"{res['rows']} of {res['matched']} sample(s) to review")
    print(f"decisions: {_e(res['decisions'])}  (edit decision keep|drop and note)")
    print(f"sheet:     {_e(res['sheet'])}")
    return 0


def _add_review_and_ledger(sub: Any) -> None:
    rv = sub.add_parser("review", help="write a decisions file to fill in and a contact sheet to look at",
                        description="Pick samples of a finished run and write a decisions file (CSV or JSON Lines "
                                    "by --out's extension: sample_id, source, decision pre-filled with today's "
                                    "verdict, note) and an HTML contact sheet beside it (same name, .html) with the "
                                    "same samples in the same order. Without filters: every dropped, flagged or "
                                    "quarantined sample. Apply the edited file with `curate run ... --decisions`.")
    rv.add_argument("run_dir", metavar="DIR", help="output directory of a finished run")
    rv.add_argument("--reason", metavar="R", help="samples dropped for this reason code")
    rv.add_argument("--flag", metavar="F", help="samples with this flag (a family such as pii matches pii:*)")
    rv.add_argument("--group", action="store_true", help="whole near-duplicate groups, largest first, keeper first")
    rv.add_argument("--limit", type=int, metavar="N", help="at most N samples (default 200; groups are not split)")
    rv.add_argument("--out", required=True, metavar="FILE", help="decisions file to write: .csv or .jsonl")
    rv.set_defaults(func=_cmd_review)

    lg = sub.add_parser("ledger", help="list ledger rows by reason, flag, verdict or split",
                        description="Answer audit questions from the ledger without writing code: filters "
                                    "combine (AND); fast on large ledgers (Arrow kernels, only the needed columns "
                                    "are read).")
    lg.add_argument("out", metavar="DIR", help="output directory of a finished run")
    lg.add_argument("--reason", metavar="R", help="samples with this drop reason")
    lg.add_argument("--flag", metavar="F", help="samples with this flag (a family such as pii matches pii:*)")
    verdict = lg.add_mutually_exclusive_group()
    verdict.add_argument("--kept", dest="kept", action="store_const", const=True, help="kept samples only")
    verdict.add_argument("--dropped", dest="kept", action="store_const", const=False, help="dropped samples only")
    lg.add_argument("--split", metavar="S", help="train, eval, quarantine, or none (dropped samples)")
    lg.add_argument("--columns", nargs="+", metavar="COL",
                    help="columns to show (names or a comma list; default sample_id source kept split reasons flags)")
    lg.add_argument("--format", choices=["table", "csv", "json"], default="table",
                    help="table (default), csv, or json (one JSON object per line)")
    lg.add_argument("--limit", type=int, metavar="N", help="at most N rows (default: 50 for table, all otherwise)")
    lg.set_defaults(func=_cmd_ledger)


def _cmd_status(a: argparse.Namespace) -> int:
    from . import api

    st = api.status(a.out)
    if a.json:
        print(json.dumps(st))
        return 0
    print(f"{_e(a.out)}: {'running' if st['running'] else ('finished' if st.get('finished') else 'not finished')}")
    for name, s in st.get("stages", {}).items():
        print(f"  {_e(name):<16} {s['kind']:<7} computed {s['ran']}, reused {s['reused']}, {s['seconds']}s")
    for name, ok in st["outputs"].items():
        print(f"  {_e(name):<16} {'present' if ok else 'missing'}")
    return 0


def _cmd_init(a: argparse.Namespace) -> int:
    from . import api

    p = api.init(a.path, preset=a.preset, force=a.force)
    print(f"wrote {_e(p)}")
    return 0


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(
        prog="curate",
        description="Turn a caption-image corpus into training-ready Parquet shards for text-to-image "
                    "diffusion models, with a ledger that explains every kept and dropped sample.",
    )
    p.add_argument("--version", action="version", version=f"curate {__version__}")
    sub = p.add_subparsers(dest="command", metavar="COMMAND")

    r = sub.add_parser("run", help="run the whole pipeline on a corpus",
                       description="Run every enabled stage, then write shards, ledger, summary and report to --out. "
                                   "Re-running with the same --out reuses every output whose inputs and config "
                                   "did not change.")
    r.add_argument("config", nargs="?", help="pipeline config (TOML); omitted: built-in defaults")
    r.add_argument("--input", help="input root: folder, manifest (.csv/.jsonl/.parquet) or tar shard(s); "
                                   "overrides [input] path")
    r.add_argument("--out", required=True, help="output directory")
    r.add_argument("--set", action="append", default=[], metavar="SECTION.KEY=VALUE",
                   help="override one config entry (repeatable), e.g. --set inspect.min_short_side=512")
    r.add_argument("--engine", choices=["local", "ray"], help="where per-shard stages run (default: config)")
    r.add_argument("--eval-set", action="append", default=[], metavar="PATH",
                   help="an outside eval set (folder, manifest or shards); training images that near-duplicate "
                        "it are dropped as eval_overlap (repeatable; adds to [split] eval_sets)")
    r.add_argument("--decisions", metavar="FILE",
                   help="a reviewer's decisions (CSV or JSONL: sample_id or source, decision keep|drop, note), "
                        "applied over the checks and recorded in the ledger; they hold on every re-run")
    r.add_argument("--json", action="store_true", help="print the summary as one JSON line")
    r.add_argument("--quiet", action="store_true", help="no progress bars")
    r.set_defaults(func=_cmd_run)

    e = sub.add_parser("explain", help="show why one sample was kept or dropped",
                       description="Print every check of one sample: its value, threshold and verdict, and its "
                                   "near-duplicate group.")
    e.add_argument("out", help="output directory of a finished run")
    e.add_argument("sample", help="sample_id (any case, or a unique prefix of 4+ characters), the manifest's own "
                                  "id, or the source path (as recorded, ./-relative, or absolute under the input root)")
    e.add_argument("--json", action="store_true", help="print JSON")
    e.set_defaults(func=_cmd_explain)

    s = sub.add_parser("status", help="show each stage's state in an output directory",
                       description="Show what the last run in an output directory computed and reused, and "
                                   "whether a run is in progress.")
    s.add_argument("out", help="output directory")
    s.add_argument("--json", action="store_true", help="print JSON")
    s.set_defaults(func=_cmd_status)

    i = sub.add_parser("init", help="write a commented starter config",
                       description="Write a pipeline config with every section and key, its default and the "
                                   "source of that default.")
    i.add_argument("path", help="where to write the config (e.g. curate.toml)")
    i.add_argument("--preset", default="default", help="default (web corpus) or finetune (small 512 px set)")
    i.add_argument("--force", action="store_true", help="overwrite an existing file")
    i.set_defaults(func=_cmd_init)
    _add_leakcheck(sub)
    _add_review_and_ledger(sub)
    _add_probe(sub)
    return p


def _cmd_leakcheck(a: argparse.Namespace) -> int:
    import os

    from . import api

    workers = a.workers if a.workers > 0 else (os.cpu_count() or 1)
    res = api.leakcheck(a.a, a.b, radius=a.radius, semantic=a.semantic, model=a.model, pretrained=a.pretrained,
                        config=a.config, html=a.html, cache_dir=a.cache_dir, workers=workers)
    pairs = res["pairs"]
    if a.json:
        print(json.dumps(res))
        return 1 if pairs else 0
    for p in pairs:
        d = f"cosine {p['cosine']}" if p["signal"] == "semantic" else f"{p['distance']:>2} bits"
        print(f"{d}  {_e(p['a'])}  <->  {_e(p['b'])}")
    for note in res["notes"]:
        print(f"note: {_e(note)}")
    for side in ("a", "b"):
        if res[f"{side}_unreadable"]:
            print(f"note: {len(res[side + '_unreadable'])} image(s) of {side.upper()} could not be decoded")
    verdict = f"LEAKS: {len(pairs)} near-duplicate pair(s)" if pairs else "clean: no near-duplicate pair"
    print(f"{verdict} within {res['radius']} bits"
          + (f" or cosine >= {res['semantic']}" if res["semantic"] else "")
          + f"; A {res['a_count']} images, B {res['b_count']} images; {res['seconds']:.2f}s")
    if a.html:
        print(f"page:     {_e(a.html)}")
    return 1 if pairs else 0


def _add_leakcheck(sub: Any) -> None:
    lk = sub.add_parser("leakcheck", help="find near-duplicate images shared by two sets (eval leaks)",
                        description="List every pair of near-duplicate images across two sets, each a folder, "
                                    "a manifest, tar shards, a shard set (Parquet with an image column) or a "
                                    "curate output. The search is exact. Exit 1 when any pair is found.")
    lk.add_argument("a", help="first set (e.g. the training shards)")
    lk.add_argument("b", help="second set (e.g. the eval shards or a benchmark folder)")
    lk.add_argument("--radius", type=int, help="Hamming radius in bits of 64 (default: neardup's)")
    lk.add_argument("--semantic", type=float, default=0.0, metavar="COSINE",
                    help="also match CLIP embeddings with cosine >= COSINE (needs --model or --config)")
    lk.add_argument("--model", default="", help="CLIP model for --semantic (open_clip name or demo)")
    lk.add_argument("--pretrained", default="", help="pretrained tag or checkpoint for --model")
    lk.add_argument("--config", help="pipeline config whose [inspect]/[hashes]/[embed] settings to use (embed "
                                     "backend/precision auto or int8 calibrate on its [input], as a run does)")
    lk.add_argument("--html", help="write a page with each pair's thumbnails side by side")
    lk.add_argument("--cache-dir", help="keep each set's hashes here for the next check")
    lk.add_argument("--workers", type=int, default=0, help="hashing processes; 0 = one per CPU core")
    lk.add_argument("--json", action="store_true", help='print JSON: {"pairs": [{"a", "b", "distance"}, ...], ...}')
    lk.set_defaults(func=_cmd_leakcheck)


def _cmd_probe_train(a: argparse.Namespace) -> int:
    from . import api

    res = api.probe_train(a.run_dir, labels=a.labels, name=a.name, out=a.out, target_precision=a.target_precision,
                          text=a.text)
    m = res["metrics"]
    if a.json:
        print(json.dumps(res))
        return 0 if m["target_met"] else 1
    lab, model = res["labels"], res["model"]
    print(f"probe {_e(res['name'])}: {lab['positive']} positive and {lab['negative']} negative labels, "
          f"{res['features']} embeddings of {_e(model['model'])} (weights sha256 {_e(model['weights_sha256'])[:12]}…)")
    print(f"cross-validated ({m['folds']} folds, near-duplicate groups kept together): ROC AUC {m['roc_auc']:.3f}; "
          f"at threshold {res['threshold']:.3f}: precision {m['precision']:.3f} (95% interval "
          f"{m['precision_ci95'][0]:.2f}-{m['precision_ci95'][1]:.2f}), recall {m['recall']:.3f} "
          f"({m['tp']} of {m['tp'] + m['fn']} positives flagged, {m['fp']} false alarm(s))")
    if not m["target_met"]:
        print(f"target precision {m['target_precision']:g} NOT reached on any threshold: the threshold above is the "
              "most precise one; label more samples (or ones the probe confuses), or accept a lower "
              "--target-precision")
    print(f"wrote    {_e(res['path'])}\n         {_e(res['sidecar'])}")
    print(f"apply it with\n  [probes.apply]\n  {res['name']} = {{ path = {json.dumps(res['path'])}, "
          'action = "flag" }')
    return 0 if m["target_met"] else 1


def _add_probe(sub: Any) -> None:
    pr = sub.add_parser("probe", help="train a filter from labelled samples (probe:<name>)",
                        description="Probes are classifiers on a run's CLIP embeddings, trained from a few hundred "
                                    "labels and applied by the [probes] config section.")
    acts = pr.add_subparsers(dest="action", metavar="ACTION", required=True)
    t = acts.add_parser("train", help="train a probe on a finished run's embeddings",
                        description="Fit a class-balanced logistic regression on the cached CLIP embeddings of "
                                    "labelled samples, report cross-validated precision, recall and ROC AUC, pick a "
                                    "threshold for the target precision, and write the probe (safetensors weights "
                                    "and a JSON sidecar). Exit 1 when no threshold reaches the target precision.")
    t.add_argument("run_dir", metavar="DIR", help="output directory of a finished `curate run`")
    t.add_argument("--labels", required=True, metavar="FILE",
                   help="CSV or JSONL: sample_id (or source) and label 0|1 per labelled sample")
    t.add_argument("--name", required=True, help="probe name; its flag is probe:<name>")
    t.add_argument("--out", metavar="PATH", help="where to write the probe (.safetensors; the .json sidecar goes "
                                                  "beside it); default DIR/probes/NAME.safetensors")
    t.add_argument("--target-precision", type=float, metavar="P",
                   help="precision the threshold is picked for, from out-of-fold scores (default 0.9)")
    t.add_argument("--text", action="store_true",
                   help="use caption embeddings as well as image embeddings (concatenated)")
    t.add_argument("--json", action="store_true", help="print the probe's sidecar as JSON")
    t.set_defaults(func=_cmd_probe_train)


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    a = parser.parse_args(argv)
    log_to_stderr()
    if not getattr(a, "func", None):
        parser.print_help()
        return 2
    try:
        return a.func(a)
    except CurateError as e:
        print(f"curate: error: {_e(e)}", file=sys.stderr)
        return e.exit_code
    except BrokenPipeError:  # the reader went away (e.g. `curate explain ... | head`)
        _silence_stdout()
        return 0
    except KeyboardInterrupt:
        print("curate: interrupted; re-run the same command to resume", file=sys.stderr)
        return 130
    except Exception as e:  # noqa: BLE001 - a bug: one line, exit 3
        print(f"curate: internal error: {type(e).__name__}: {e} (a bug in curate; please report it with the "
              "command you ran)", file=sys.stderr)
        return 3


def _silence_stdout() -> None:
    """Point stdout at /dev/null so Python's exit flush does not raise again on the closed pipe."""
    import os

    try:
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
    except OSError:
        pass


if __name__ == "__main__":
    sys.exit(main())
