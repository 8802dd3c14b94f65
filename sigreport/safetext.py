"""Text from headers, case files and paths is data: before it is shown, control characters go.

Two views, one rule set:

- :func:`terminal_text` for what is printed on a terminal: ANSI/ECMA-48 escape sequences
  (CSI ``ESC [``, OSC ``ESC ]``, two-character ``ESC x``) are removed whole, as is every other C0
  and C1 control character (ECMA-48 section 5) except newline and tab, DEL, and the Unicode
  bidirectional overrides and isolates (Unicode TR #9, the "Trojan Source" characters), which
  could make a line read differently from what it holds.
- :func:`one_line` for text placed inside a line of a report: the same, and every character
  Python's ``str.splitlines`` breaks lines at (CR, LF, VT, FF, FS, GS, RS, NEL, LS, PS) and tab
  becomes a space, so a value can never start a line of its own.

Both replace lone surrogates (undecodable bytes kept by ``surrogateescape``) with U+FFFD, so the
text can always be written as UTF-8.
"""

from __future__ import annotations

import re
from typing import Any

# ECMA-48 5.4: CSI = ESC [ parameter bytes 0x30-0x3F, intermediate bytes 0x20-0x2F, final byte
# 0x40-0x7E. OSC/DCS/PM/APC strings end with BEL or ST (ESC \). Also their 8-bit C1 forms.
_ESCAPE_SEQUENCE = re.compile(
    r"(?:\x1b\[|\x9b)[0-?]*[ -/]*[@-~]?"
    r"|(?:\x1b[\]P^_X]|[\x90\x98\x9d\x9e\x9f])[^\x07\x1b\x9c]*(?:\x07|\x1b\\|\x9c)?"
    r"|\x1b[ -/]*[0-~]?"
)
_BIDI = "\u061c\u200e\u200f\u202a\u202b\u202c\u202d\u202e\u2066\u2067\u2068\u2069"
_CONTROL_KEEP_LINES = re.compile(f"[\\x00-\\x08\\x0b-\\x1f\\x7f-\\x9f{_BIDI}]")
_LINE_BREAKS = re.compile("[\\t\\n\\r\\x0b\\x0c\\x1c-\\x1e\\x85\\u2028\\u2029]")
_CONTROL = re.compile(f"[\\x00-\\x1f\\x7f-\\x9f{_BIDI}]")
_SURROGATE = re.compile("[\\ud800-\\udfff]")


def terminal_text(value: Any) -> str:
    """``value`` as text safe to print on a terminal (newlines and tabs kept)."""
    text = _SURROGATE.sub("\ufffd", str(value))
    text = _ESCAPE_SEQUENCE.sub("", text)
    text = text.replace("\r\n", "\n").replace("\r", "\n")
    return _CONTROL_KEEP_LINES.sub("", text)


def one_line(value: Any) -> str:
    """``value`` as text that stays on the line it is put in (no line breaks, no controls)."""
    text = _SURROGATE.sub("\ufffd", str(value))
    text = _ESCAPE_SEQUENCE.sub("", text)
    text = _LINE_BREAKS.sub(" ", text)
    return _CONTROL.sub("", text)


def clean_strings(value: Any) -> Any:
    """A copy of a JSON-like structure with every string (keys too) passed through
    :func:`one_line`."""
    if isinstance(value, str):
        return one_line(value)
    if isinstance(value, dict):
        return {clean_strings(k): clean_strings(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [clean_strings(v) for v in value]
    return value
