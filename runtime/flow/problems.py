"""Problems with a flow, and how they are worded: key paths, "did you mean", TOML syntax errors.

A key path is a tuple of table keys and array positions, as the parsed TOML
is indexed: ``("blocks", "split", "channels")`` or ``("links", 2, "select")``.
It is written for people in one place, :func:`format_key_path`:
``blocks.split.channels``, ``links[2].select``.
"""

from __future__ import annotations

import difflib
import re
import tomllib
from collections.abc import Callable, Iterable
from dataclasses import dataclass

__all__ = ["FlowErrors", "KeyPath", "Problem", "did_you_mean", "format_key_path", "known_names", "printable",
           "parse_key_path", "ProblemLog", "syntax_problem"]

KeyPath = tuple[str | int, ...]


#: At most this many characters of a problem's message are printed (the rest is elided in the middle).
MESSAGE_CHARS = 600


def printable(text: str, limit: int) -> str:
    r"""``text`` safe for a terminal: control and format characters (escape sequences, a newline in a
    name, bidirectional overrides) written as escapes, and shortened to about ``limit`` characters.

    >>> printable("red\x1b[31m name\n", 80), printable("x" * 50, 20)
    ('red\\x1b[31m name\\n', 'xxxx … (50 characters) … xxxx')
    """
    if len(text) > limit:
        keep = max(4, (limit - 24) // 2)
        text = f"{text[:keep]} … ({len(text)} characters) … {text[-keep:]}"
    if text.isprintable():
        return text
    return "".join(c if c.isprintable() else repr(c)[1:-1] for c in text)


def format_key_path(path: Iterable[str | int]) -> str:
    """``("links", 2, "select")`` as ``links[2].select``.

    >>> format_key_path(("blocks", "split", "channels")), format_key_path(("links", 2, "select"))
    ('blocks.split.channels', 'links[2].select')
    """
    text = ""
    for part in path:
        text += f"[{part}]" if isinstance(part, int) else (f".{part}" if text else str(part))
    return text


def parse_key_path(text: str) -> KeyPath:
    """The inverse of :func:`format_key_path` (for names without dots or brackets)."""
    return tuple(int(token[1:-1]) if token.startswith("[") else token
                 for token in re.findall(r"[^.\[\]]+|\[\d+\]", text))


@dataclass(frozen=True)
class Problem:
    """One thing wrong with a flow file: where (file, line, column, key path) and what."""

    file: str
    where: str
    message: str
    line: int | None = None
    column: int | None = None

    def __str__(self) -> str:
        place = printable(self.file, 200)
        if self.line:
            place += f":{self.line}"
            if self.column:
                place += f":{self.column}"
        message = printable(self.message, MESSAGE_CHARS)
        return f"{place}: {printable(self.where, 200)}: {message}" if self.where else f"{place}: {message}"


class FlowErrors(ValueError):
    """Every problem found in a flow file (``problems``), one per line in the message."""

    def __init__(self, problems: Iterable[Problem]) -> None:
        self.problems = list(problems)
        super().__init__("\n".join(str(p) for p in self.problems))


def did_you_mean(name: object, candidates: Iterable[object]) -> str:
    """`` (did you mean 'x'?)`` for the closest candidate, or nothing."""
    match = difflib.get_close_matches(str(name), [str(c) for c in candidates], n=1, cutoff=0.6)
    return f" (did you mean {match[0]!r}?)" if match else ""


def known_names(candidates: Iterable[object]) -> str:
    """The candidates quoted and sorted, or ``none``."""
    names = sorted(candidates, key=str)
    return ", ".join(repr(c) for c in names) if names else "none"


def syntax_problem(path: object, error: tomllib.TOMLDecodeError) -> Problem:
    """A TOML syntax error as a Problem with line and column.

    Python 3.11-3.13 put the position only in the message text "(at line 3,
    column 7)"; 3.14 adds ``lineno`` and ``colno``. Both are read.
    """
    text = str(error)
    m = re.search(r"\(at line (\d+), column (\d+)\)", text)
    line = getattr(error, "lineno", None) or (int(m.group(1)) if m else None)
    column = getattr(error, "colno", None) or (int(m.group(2)) if m else None)
    message = re.sub(r"\s*\(at line \d+, column \d+\)", "", getattr(error, "msg", text) or text)
    message = re.sub(r"\s*\(at end of document\)", " (at the end of the file)", message)
    if message.startswith("Illegal character '\\n'"):
        message += " — a line ends inside a value; is a closing quote or bracket missing?"
    return Problem(str(path), "", f"TOML syntax error: {message}", line, column)


class ProblemLog:
    """Collects problems of one flow file, each placed by key path (and line, through ``locate``)."""

    def __init__(self, file: object, locate: Callable[[KeyPath], int | None] = lambda path: None) -> None:
        self.file = str(file)
        self.locate = locate
        self.problems: list[Problem] = []

    def add(self, key_path: KeyPath, message: str) -> None:
        self.problems.append(Problem(self.file, format_key_path(key_path), message, self.locate(key_path)))

    def __len__(self) -> int:
        return len(self.problems)
