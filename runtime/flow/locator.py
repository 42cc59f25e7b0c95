"""Finding the line of a key path in a flow file's text (parsed TOML keeps no positions).

The text is scanned once for table headers (``[blocks.split]``,
``[[links]]``); each lookup then walks only the lines of one table.
"""

from __future__ import annotations

import re
import tomllib

from .problems import KeyPath

__all__ = ["KeyLocator"]

def _header(line: str) -> tuple[bool, tuple[str, ...]] | None:
    """(is an array table, its dotted name split) when ``line`` is a table header. Plain string
    operations, linear in the line's length whatever it holds (no backtracking pattern)."""
    text = line.strip()
    if not text.startswith("["):
        return None
    array = text.startswith("[[")
    body = text[2 if array else 1:]
    end = body.find("]")
    if end <= 0:
        return None
    name, tail = body[:end].strip(), body[end + 1:]
    if array:
        if not tail.startswith("]"):
            return None
        tail = tail[1:]
    tail = tail.strip()
    if not name or (tail and not tail.startswith("#")):
        return None
    parts = tuple(_unquote(p.strip()) for p in name.split("."))
    return array, parts


def _unquote(part: str) -> str:
    """A key of a table header as TOML reads it: ``"a\\n"`` is "a" and a newline, ``'x'`` is x."""
    if len(part) >= 2 and part[0] == part[-1] == '"':
        try:
            return str(tomllib.loads(f"k = {part}")["k"])
        except tomllib.TOMLDecodeError:
            return part.strip('"')
    return part.strip("'")


class KeyLocator:
    """``find(key_path)`` gives the 1-based line where the key (or its table) is written, or None.

    >>> KeyLocator('[blocks.split]\\ntype = "channelizer"\\nchannels = 8\\n').find(("blocks", "split", "channels"))
    3
    """

    def __init__(self, text: str) -> None:
        self.lines = text.splitlines()
        self.headers = [_header(line) for line in self.lines]

    def _table_start(self, name: tuple[str, ...], occurrence: int) -> int | None:
        seen = -1
        for i, header in enumerate(self.headers):
            if header and header[1] == name:
                seen += 1
                if seen == occurrence:
                    return i
        return None

    def find(self, path: KeyPath) -> int | None:
        path = tuple(path)
        if not path:
            return None
        table: tuple[str, ...] | None
        if path[0] == "links" and len(path) >= 2 and isinstance(path[1], int):
            table, rest, occurrence = ("links",), path[2:], path[1]
        elif path[0] in ("blocks", "hosts") and len(path) >= 2:
            table, rest, occurrence = (path[0], str(path[1])), path[2:], 0
        elif path[0] == "flow":
            table, rest, occurrence = ("flow",), path[1:], 0
        else:
            for i, header in enumerate(self.headers):
                if header and header[1][0] == path[0]:
                    return i + 1
            table, rest, occurrence = None, path, 0
        start = 0
        if table is not None:
            found = self._table_start(table, occurrence)
            if found is None:
                return None
            start = found
            if not rest:
                return start + 1
        key = re.compile(rf"^\s*[\"']?{re.escape(str(rest[0]))}[\"']?\s*=")
        for i in range(start + (1 if table is not None else 0), len(self.lines)):
            if self.headers[i] and table is not None:
                break
            if key.match(self.lines[i]):
                return i + 1
        return start + 1 if table is not None else None
