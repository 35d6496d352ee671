"""CLI: exit codes, help text for every command, README coverage; results checked through the library."""
from __future__ import annotations

import json
import subprocess
import sys

import pytest

from curate import api
from curate.cli import build_parser, main

from conftest import ROOT, make_small_corpus

FAST = ["--set", "run.workers=1", "--set", "embed.enabled=false", "--set", "agreement.enabled=false"]


def _commands() -> dict:
    parser = build_parser()
    sub = next(a for a in parser._actions if a.__class__.__name__ == "_SubParsersAction")
    return dict(sub.choices), {a.dest: a.help for a in sub._choices_actions}


def test_every_command_has_help_and_is_in_the_readme():
    choices, helps = _commands()
    readme = (ROOT / "README.md").read_text(encoding="utf-8")
    assert {"run", "explain", "status", "init", "leakcheck", "review", "ledger"} <= set(choices)
    for name, p in choices.items():
        assert helps.get(name), f"{name} has no help line"
        assert p.format_help().strip()
        assert f"curate {name}" in readme, f"README does not show `curate {name}`"


def test_help_everywhere_exits_zero():
    for args in (["--help"], ["run", "--help"], ["explain", "--help"], ["status", "--help"], ["init", "--help"],
                 ["leakcheck", "--help"], ["review", "--help"], ["ledger", "--help"]):
        r = subprocess.run([sys.executable, "-m", "curate.cli", *args], capture_output=True, text=True)
        assert r.returncode == 0 and "usage:" in r.stdout, args


def test_run_explain_status_roundtrip(tmp_path, capsys):
    corpus = make_small_corpus(tmp_path / "c", 6)
    (corpus / "b" / "item000.txt").write_text("DSC00123", encoding="utf-8")
    out = tmp_path / "out"
    assert main(["run", "--input", str(corpus), "--out", str(out), "--quiet", *FAST]) == 0
    capsys.readouterr()
    assert main(["explain", str(out), "b/item000.jpg", "--json"]) == 0
    info = json.loads(capsys.readouterr().out)
    assert info["kept"] is False and info["reasons"] == ["caption_filename"]
    # the same through the library
    assert api.explain(out, info["sample_id"])["reasons"] == ["caption_filename"]
    failing = [c for c in info["checks"] if c["failed"]]
    assert failing and all({"stage", "code", "value", "threshold", "action"} <= set(c) for c in failing)
    assert main(["explain", str(out), "b/item000.jpg"]) == 0
    text = capsys.readouterr().out
    assert "caption_filename" in text and "DROPPED" in text
    assert main(["status", str(out), "--json"]) == 0
    st = json.loads(capsys.readouterr().out)
    assert st["finished"] and not st["running"] and st["outputs"]["ledger.parquet"]


@pytest.mark.parametrize(
    "args,code",
    [
        (["run", "--input", "/no/such/dir", "--out", "{tmp}/o"], 2),
        (["run", "--input", "{tmp}", "--out", "{tmp}/o", "--set", "inspect.min_short_side=big"], 2),
        (["run", "{tmp}/missing.toml", "--out", "{tmp}/o"], 2),
        (["run", "--out", "{tmp}/o"], 2),
        (["explain", "{tmp}/nothing", "x"], 2),
        (["status", "{tmp}/nothing"], 2),
        (["frobnicate"], 2),
        ([], 2),
    ],
)
def test_exit_codes_for_bad_usage(tmp_path, args, code, capsys):
    args = [a.replace("{tmp}", str(tmp_path)) for a in args]
    try:
        rc = main(args)
    except SystemExit as e:  # argparse's own usage errors
        rc = e.code
    assert rc == code
    err = capsys.readouterr().err
    assert err.count("\n") <= 3  # one clear line (argparse adds a usage line)


def test_config_error_names_file_and_key(tmp_path, capsys):
    cfg = tmp_path / "c.toml"
    cfg.write_text("[caption]\nmin_chars = 'five'\n")
    assert main(["run", str(cfg), "--input", str(tmp_path), "--out", str(tmp_path / "o")]) == 2
    err = capsys.readouterr().err
    assert str(cfg) in err and "caption.min_chars" in err and "integer" in err


def test_explain_unknown_sample(tmp_path, capsys):
    corpus = make_small_corpus(tmp_path / "c", 2)
    main(["run", "--input", str(corpus), "--out", str(tmp_path / "o"), "--quiet", *FAST])
    assert main(["explain", str(tmp_path / "o"), "nope.jpg"]) == 2
    assert "no sample" in capsys.readouterr().err


def test_init_writes_and_refuses_to_overwrite(tmp_path):
    p = tmp_path / "c.toml"
    assert main(["init", str(p)]) == 0 and p.exists()
    assert main(["init", str(p)]) == 2
    assert main(["init", str(p), "--force", "--preset", "finetune"]) == 0
    assert "min_short_side = 512" in p.read_text()


def test_every_reason_code_is_documented_in_the_readme():
    from curate.stages import all_checks

    readme = (ROOT / "README.md").read_text(encoding="utf-8")
    for code in all_checks():
        assert f"`{code}" in readme, f"README's reason table lacks {code}"
