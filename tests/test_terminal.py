"""Terminal safety: names from the data never reach a terminal as control characters.

Reference: ECMA-48 (5th ed., = ISO/IEC 6429) defines the C0 set (0x00-0x1F: BEL 0x07,
ESC 0x1B), DEL 0x7F and the C1 set (0x80-0x9F: CSI 0x9B, OSC 0x9D); "ESC ] 0 ; text BEL"
sets an xterm window title and "ESC [ 2 J" erases the display (xterm control sequences).
Unicode UAX #9 defines the bidirectional override U+202E. JSON (RFC 8259 sec. 7) must escape
U+0000-U+001F; Python's json.dumps escapes every non-ASCII character by default.
"""
from __future__ import annotations

import json
import os
import subprocess
import sys
import unicodedata
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from curate import api
from curate.terminal import escape

from conftest import jpeg_bytes

ROOT = Path(__file__).resolve().parents[1]

TITLE = "\x1b]0;owned\x07"  # OSC 0: set the window title
CLEAR = "\x1b[2J"  # CSI 2 J: erase the display
RAW_CONTROLS = ("\x1b", "\x07", "\x9b", "\x9d", "\r")


@pytest.mark.parametrize(
    ("text", "want"),
    [
        (TITLE + "mug.jpg", "\\x1b]0;owned\\x07mug.jpg"),
        (CLEAR + "bowl", "\\x1b[2Jbowl"),
        ("\x9b2Jvase\x9d0;t\x9c", "\\x9b2Jvase\\x9d0;t\\x9c"),  # the one-byte C1 forms
        ("a\nb\rc\td\x00e\x7f", "a\\nb\\rc\\td\\x00e\\x7f"),
        ("cup\u202egpj.exe", "cup\\u202egpj.exe"),  # shown reversed without the escape
        ("inv\udcffname.jpg", "inv\\udcffname.jpg"),  # a name that is not UTF-8 (surrogate escape)
        ("café ☕ 中文 Ünïcödé — “quotes”", "café ☕ 中文 Ünïcödé — “quotes”"),  # printable text stays
        (None, "None"),
    ],
)
def test_escape(text, want):
    assert escape(text) == want


@given(st.text())
@settings(max_examples=300, deadline=None)
def test_escape_leaves_no_control_character(text):
    out = escape(text)
    assert not any(unicodedata.category(c) in ("Cc", "Cs", "Zl", "Zp") for c in out)
    out.encode("utf-8")  # always printable on a UTF-8 terminal
    if not any(unicodedata.category(c) in ("Cc", "Cs", "Zl", "Zp", "Cf") for c in text):
        assert out == text  # text with nothing to escape passes unchanged


def _cli(*args: str) -> subprocess.CompletedProcess:
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    return subprocess.run([sys.executable, "-m", "curate.cli", *args], capture_output=True, env=env, timeout=600)


def _assert_clean(data: bytes) -> None:
    text = data.decode("utf-8")
    for c in RAW_CONTROLS:
        assert c not in text, (c, text[:300])


@pytest.fixture(scope="module")
def hostile_output(tmp_path_factory):
    base = tmp_path_factory.mktemp("term")
    corpus = base / "corpus"
    corpus.mkdir()
    names = [f"{TITLE}title.jpg", f"{CLEAR}clear.jpg", "plain.jpg", "\x9b31mcsi.jpg"]
    for i, n in enumerate(names):
        (corpus / n).write_bytes(jpeg_bytes((400, 300), (30 + 60 * i, 90, 200 - 40 * i)))
        (corpus / n).with_suffix(".txt").write_text(f"a glazed mug number {i} {CLEAR}on a table")
    (corpus / "copy.jpg").write_bytes((corpus / names[0]).read_bytes())  # a near-duplicate group with it
    (corpus / "copy.txt").write_text("a glazed mug copy on a table")
    (base / "elsewhere").mkdir()
    os.symlink(base / "elsewhere", corpus / f"{TITLE}linked")  # a linked folder: a logged warning
    out = base / "out"
    proc = _cli("run", "--input", str(corpus), "--out", str(out), "--quiet",
                "--set", "embed.enabled=false", "--set", "agreement.enabled=false", "--set", "run.workers=1")
    assert proc.returncode == 0, proc.stderr.decode(errors="replace")[-2000:]
    _assert_clean(proc.stdout)
    _assert_clean(proc.stderr)
    assert "\\x1b]0;owned\\x07linked" in proc.stderr.decode()  # the warning names the folder, escaped
    return corpus, out, names


def test_explain_prints_escaped_sources(hostile_output):
    _corpus, out, names = hostile_output
    for name in (names[0], names[3]):  # OSC title (and its near-duplicate group), one-byte CSI
        proc = _cli("explain", str(out), name)
        assert proc.returncode == 0, proc.stderr
        _assert_clean(proc.stdout)
        assert escape(name) in proc.stdout.decode()
    js = _cli("explain", str(out), names[1], "--json")
    _assert_clean(js.stdout)
    assert json.loads(js.stdout)["source"] == names[1]  # JSON keeps the exact name, escaped by JSON


def test_error_messages_are_escaped(hostile_output):
    _corpus, out, _names = hostile_output
    proc = _cli("explain", str(out), f"{TITLE}{CLEAR}nothing-by-this-name")
    assert proc.returncode == 2
    _assert_clean(proc.stderr)
    assert "\\x1b]0;owned\\x07" in proc.stderr.decode()


def test_leakcheck_prints_escaped_paths(hostile_output, tmp_path):
    corpus, _out, names = hostile_output
    other = tmp_path / "other"
    other.mkdir()
    (other / f"{CLEAR}again.jpg").write_bytes((corpus / names[0]).read_bytes())
    proc = _cli("leakcheck", str(corpus), str(other), "--workers", "1")
    assert proc.returncode == 1, proc.stderr
    _assert_clean(proc.stdout)
    _assert_clean(proc.stderr)
    assert "\\x1b[2Jagain.jpg" in proc.stdout.decode()
    js = _cli("leakcheck", str(corpus), str(other), "--workers", "1", "--json")
    _assert_clean(js.stdout)
    pairs = json.loads(js.stdout)["pairs"]
    assert any(p["b"].endswith(f"{CLEAR}again.jpg") for p in pairs)


def test_api_explain_keeps_the_exact_source(hostile_output):
    # escaping is for the terminal only: the library returns the source as it is
    _corpus, out, names = hostile_output
    assert api.explain(out, names[0])["source"] == names[0]
