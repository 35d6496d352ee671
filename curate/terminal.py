"""Text made safe to print on a terminal: control characters become visible escapes.

File names, captions and sources are data and may hold bytes a terminal acts
on (ESC sequences that set the title or clear the screen, BEL, carriage
returns that overwrite a line). `escape` writes every such character as a
backslash escape and keeps all printable text, in any script, as it is.
"""
from __future__ import annotations

import logging
import re
import sys

# C0 controls (incl. ESC, newline, tab), DEL and C1 controls (incl. the one-byte CSI, U+009B)
# per ECMA-48 / ISO 6429; the Unicode line and paragraph separators; the bidirectional
# embedding, override and isolate controls, which reorder what is shown (Unicode UAX #9);
# and lone surrogates (file names that are not UTF-8), which cannot be written at all.
_UNSAFE = re.compile("[\x00-\x1f\x7f-\x9f\u2028\u2029\u200e\u200f\u202a-\u202e\u2066-\u2069\ud800-\udfff]")
_NAMED = {"\n": "\\n", "\r": "\\r", "\t": "\\t"}


def _sub(m: re.Match) -> str:
    c = m.group()
    if c in _NAMED:
        return _NAMED[c]
    return f"\\x{ord(c):02x}" if ord(c) < 0x100 else f"\\u{ord(c):04x}"


def escape(value: object) -> str:
    """`str(value)` with every control character written as `\\xNN`, `\\uNNNN`, `\\n`, `\\r` or `\\t`."""
    return _UNSAFE.sub(_sub, str(value))


class _EscapingStderr(logging.Handler):
    """Log records to the current sys.stderr, one line each, with their text escaped."""

    def emit(self, record: logging.LogRecord) -> None:
        try:
            sys.stderr.write(f"curate: {record.levelname.lower()}: {escape(record.getMessage())}\n")
        except Exception:  # noqa: BLE001 - logging must never break the command
            self.handleError(record)


def log_to_stderr() -> None:
    """Send curate's warnings to stderr, escaped (once per process)."""
    logger = logging.getLogger("curate")
    if not any(isinstance(h, _EscapingStderr) for h in logger.handlers):
        handler = _EscapingStderr()
        handler.setLevel(logging.WARNING)
        logger.addHandler(handler)
