"""Checks on a flow file's bytes before TOML parsing, each in one pass (linear time, no recursion).

What the TOML reader would handle badly is refused here with a line number:
a file larger than :data:`MAX_FLOW_BYTES`, a byte-order mark, text that is not
UTF-8, arrays or inline tables nested deeper than :data:`MAX_NESTING` (the
reader recurses once per level), and a run of more than :data:`MAX_DIGITS`
digits outside strings (no parameter takes such a number, and Python refuses
to convert very long ones).
"""

from __future__ import annotations

from .problems import Problem

__all__ = ["MAX_DIGITS", "MAX_FLOW_BYTES", "MAX_NESTING", "check_text", "decode_flow"]

MAX_FLOW_BYTES = 1 << 20
MAX_NESTING = 32
MAX_DIGITS = 64


def decode_flow(path: str, raw: bytes) -> tuple[str | None, list[Problem]]:
    """The text of a flow file, or None and the problems that stop it being read."""
    if len(raw) > MAX_FLOW_BYTES:
        return None, [Problem(path, "", f"the flow file is {len(raw)} bytes; flow files are at most "
                                        f"{MAX_FLOW_BYTES} bytes (1 MiB)")]
    if raw.startswith(b"\xef\xbb\xbf"):
        return None, [Problem(path, "", "the file starts with a byte-order mark; save it as UTF-8 without one", 1, 1)]
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as error:
        line = raw.count(b"\n", 0, error.start) + 1
        column = error.start - (raw.rfind(b"\n", 0, error.start) + 1) + 1
        return None, [Problem(path, "", f"the flow file is not UTF-8 text ({error.reason}, byte "
                                        f"0x{raw[error.start]:02x} at offset {error.start})", line, column)]
    return text, check_text(path, text)


def check_text(path: str, text: str) -> list[Problem]:
    """Nesting and digit runs outside strings and comments (the lexical rules of TOML 1.0)."""
    depth = 0
    line = 1
    digits = 0
    i, n = 0, len(text)
    while i < n:
        c = text[i]
        if c == "\n":
            line += 1
        if c.isdigit() or (c == "_" and digits):
            digits += 1
            if digits > MAX_DIGITS:
                return [Problem(path, "", f"a number of more than {MAX_DIGITS} digits; no parameter takes one", line)]
            i += 1
            continue
        digits = 0
        if c == "#":
            end = text.find("\n", i)
            i = n if end < 0 else end
            continue
        if c in "\"'":
            quote = c * 3 if text.startswith(c * 3, i) else c
            i += len(quote)
            while i < n and not text.startswith(quote, i):
                if text[i] == "\\" and c == '"':
                    i += 1
                elif text[i] == "\n":
                    if len(quote) == 1:
                        break             # the reader reports the unclosed string
                    line += 1
                i += 1
            i += len(quote)
            continue
        if c in "[{":
            depth += 1
            if depth > MAX_NESTING:
                return [Problem(path, "", f"arrays or inline tables nested more than {MAX_NESTING} deep; a flow "
                                          f"needs a few levels at most", line)]
        elif c in "]}":
            depth = max(0, depth - 1)
        i += 1
    return []
