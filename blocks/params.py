"""Declared parameters: what a block (or a link) accepts, and how a flow file's value is checked.

A :class:`Param` has a *kind*; each kind is one row of :data:`KINDS`, a small
converter function plus the words that describe it. ``Param.convert`` runs
the kind's converter, then the numeric bounds; the kind list that plugins are
checked against, ``Param.describe_type`` and the generated block reference all
come from that table, so a new kind is one new row.

Values arrive as tomllib gives them. ``bool`` is a subclass of ``int`` in
Python, so every numeric converter refuses booleans explicitly.
"""

from __future__ import annotations

import difflib
import math
from collections.abc import Callable
from dataclasses import KW_ONLY, dataclass
from typing import Any

from .units import UnitError, parse_quantity

__all__ = ["KINDS", "Kind", "MAX_CHANNELS", "Param", "REQUIRED", "UNIT_BOUNDS", "path_problem", "shortened",
           "toml_repr"]

#: Bounds a quantity takes from its unit when its declaration gives none: finite, and wide enough for
#: anything physical (frequencies to 3 THz, the top of the radio spectrum as the ITU Radio Regulations
#: define it [from memory]; times to about 116 days; levels and ratios to +-400 dB, far past any
#: receiver's range [common practice]).
UNIT_BOUNDS: dict[str, tuple[float, float]] = {"Hz": (-3e12, 3e12), "s": (-1e7, 1e7), "dB": (-400.0, 400.0),
                                               "dBFS": (-400.0, 400.0)}
#: The most channels one link carries: its channel list and centres travel in every message header,
#: which wire.HEADER_LIMIT caps at 64 KiB (measured: 4,096 channels take about 49 KB, 5,000 about 60 KB).
MAX_CHANNELS = 4096


class _Required:
    """The default of a parameter that has none: the flow must give it."""

    def __repr__(self) -> str:
        return "REQUIRED"


REQUIRED: Any = _Required()


def shortened(text: str, limit: int = 80) -> str:
    """``text`` itself, or for a long one its ends and its length: a message names a value, it does not
    repeat it.

    >>> shortened("a" * 100)
    'aaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaa … (100 characters) … aaaaaaaaaaaaaaaa'
    """
    return text if len(text) <= limit else f"{text[:32]} … ({len(text)} characters) … {text[-16:]}"


def toml_repr(value: object) -> str:
    """A value as it would be written in TOML, for messages: true, "text", 16, [1, 2].

    >>> toml_repr(True), toml_repr('a "b"'), toml_repr([1, 2.5])
    ('true', '"a \\\\"b\\\\""', '[1, 2.5]')
    """
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, str):
        value = shortened(value)
        return '"' + value.replace("\\", "\\\\").replace('"', '\\"') + '"'
    if isinstance(value, list):
        return shortened("[" + ", ".join(toml_repr(v) for v in value) + "]")
    if isinstance(value, dict):
        return shortened("{ " + ", ".join(f"{k} = {toml_repr(v)}" for k, v in value.items()) + " }")
    return shortened(repr(value))


@dataclass(frozen=True)
class Kind:
    """One kind of parameter: ``convert(param, value)`` returns the checked value or raises
    ValueError saying what was expected; ``describe(param)`` names the kind for people."""

    name: str
    describe: Callable[[Param], str]
    convert: Callable[[Param, Any], Any]


def _expected(param: Param, words: str, value: object) -> ValueError:
    return ValueError(f"expected {param.rule or words}, got {toml_repr(value)}")


def _bound(value: float) -> str:
    """A bound for a message: whole numbers in full (16777216), others as %g."""
    return str(int(value)) if float(value).is_integer() and abs(value) < 1e16 else f"{value:g}"


def _to_int(param: Param, value: Any) -> int:
    if isinstance(value, bool) or not isinstance(value, int):
        raise _expected(param, "a whole number", value)
    return int(value)


def _to_float(param: Param, value: Any) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise _expected(param, "a number", value)
    try:
        return float(value)
    except OverflowError:                 # an int beyond any float: no parameter takes one
        raise _expected(param, "a finite number", value) from None


def _to_quantity(param: Param, value: Any) -> float:
    assert param.unit is not None
    try:
        return parse_quantity(value, param.unit)
    except UnitError as error:
        raise ValueError(str(error)) from None


def _to_bool(param: Param, value: Any) -> bool:
    if not isinstance(value, bool):
        raise _expected(param, "true or false", value)
    return value


def _to_text(param: Param, value: Any) -> str:
    if not isinstance(value, str) or not value:
        raise _expected(param, f"{param.describe_type()} as a quoted string", value)
    return value


#: The longest path and the longest name in it that Linux accepts, in bytes (PATH_MAX and NAME_MAX of
#: <linux/limits.h>, 4096 with its closing NUL, and 255): longer ones fail in the OS with ENAMETOOLONG.
MAX_PATH_BYTES, MAX_NAME_BYTES = 4095, 255


def path_problem(text: str) -> str | None:
    """What makes ``text`` unusable as a path on any file system here, or None: a NUL character, or more
    bytes (UTF-8) than the OS takes in a path or in one of its names.

    >>> path_problem("a/b.cf32") is None, path_problem("a\\x00b"), path_problem("x" * 300)
    (True, 'a path cannot hold a NUL character', 'a name in a path is at most 255 bytes; one here is 300')
    """
    if "\x00" in text:
        return "a path cannot hold a NUL character"
    encoded = text.encode("utf-8", "surrogateescape")
    if len(encoded) > MAX_PATH_BYTES:
        return f"a path is at most {MAX_PATH_BYTES} bytes; this one is {len(encoded)}"
    longest = max(len(part) for part in encoded.split(b"/"))
    if longest > MAX_NAME_BYTES:
        return f"a name in a path is at most {MAX_NAME_BYTES} bytes; one here is {longest}"
    return None


def _to_path(param: Param, value: Any) -> str:
    text = _to_text(param, value)
    problem = path_problem(text)
    if problem:
        raise ValueError(f"{problem}: got {toml_repr(text)}")
    if param.kind == "input-path" and text.rstrip("/").rsplit("/", 1)[-1] in ("", ".", ".."):
        raise ValueError(f"expected the path of a file, got {toml_repr(text)}, which names a folder")
    return text


def _to_choice(param: Param, value: Any) -> Any:
    if value not in param.choices:
        if param.rule:
            raise _expected(param, "", value)
        hint = difflib.get_close_matches(str(value), [str(c) for c in param.choices], n=1)
        extra = f" (did you mean {toml_repr(hint[0])}?)" if hint else ""
        raise ValueError(f"expected one of {', '.join(toml_repr(c) for c in param.choices)}, "
                         f"got {toml_repr(value)}{extra}")
    return value


def _to_list(param: Param, value: Any) -> list:
    if not isinstance(value, list):
        raise _expected(param, "a list", value)
    return value


def _as_is(param: Param, value: Any) -> Any:
    return value


def _words(text: str) -> Callable[[Param], str]:
    return lambda param: text


KINDS: dict[str, Kind] = {kind.name: kind for kind in (
    Kind("int", _words("whole number"), _to_int),
    Kind("float", _words("number"), _to_float),
    Kind("quantity", lambda p: f"number in {p.unit}", _to_quantity),
    Kind("bool", _words("true or false"), _to_bool),
    Kind("str", _words("text"), _to_text),
    Kind("input-path", _words("path of an existing file"), _to_path),
    Kind("output-path", _words("path of a file to write"), _to_path),
    Kind("choice", lambda p: "one of " + ", ".join(toml_repr(c) for c in p.choices), _to_choice),
    Kind("list", _words("list"), _to_list),
    Kind("channels", _words("channel selection"), _as_is),
)}


@dataclass(frozen=True)
class Param:
    """A declared parameter of a block (or an option of a link).

    ``kind`` names a row of :data:`KINDS`: ``int``, ``float``, ``str``,
    ``bool``, ``choice`` (one of ``choices``), ``quantity`` (a number with
    ``unit``: Hz, s, dB or dBFS), ``input-path`` (a file that must exist,
    relative to the flow file's folder), ``output-path`` (relative to the
    run's output folder; may contain ``{channel}``-style placeholders),
    ``channels`` (a channel selection, see docs/flow-files.md) or ``list``.
    ``minimum`` and ``maximum`` bound numbers (every number is bounded: a
    quantity without them takes its unit's :data:`UNIT_BOUNDS`, and
    registration refuses an ``int`` or ``float`` without both); ``rule``, when
    given, replaces the generic "expected ..." words of a refusal.

    >>> queue = Param("queue", "int", "messages held", default=8, minimum=1, maximum=100)
    >>> queue.convert(16), queue.describe_type(), queue.required
    (16, 'whole number', False)
    >>> queue.convert(0)
    Traceback (most recent call last):
    ValueError: expected at least 1, got 0
    """

    name: str
    kind: str
    doc: str
    _: KW_ONLY
    default: Any = REQUIRED
    unit: str | None = None
    choices: tuple = ()
    minimum: float | None = None
    maximum: float | None = None
    rule: str | None = None

    def __post_init__(self) -> None:
        if self.kind == "quantity" and self.unit in UNIT_BOUNDS:
            low, high = UNIT_BOUNDS[self.unit]
            object.__setattr__(self, "minimum", low if self.minimum is None else self.minimum)
            object.__setattr__(self, "maximum", high if self.maximum is None else self.maximum)

    @property
    def required(self) -> bool:
        """True when the flow must give a value (there is no default)."""
        return self.default is REQUIRED

    def describe_type(self) -> str:
        """The kind in words, for messages and the block reference."""
        kind = KINDS.get(self.kind)
        return kind.describe(self) if kind else self.kind

    def convert(self, value: Any) -> Any:
        """Check and convert a value from the flow file; raise ValueError saying what was expected."""
        given = value
        value = KINDS[self.kind].convert(self, value)
        number = isinstance(value, (int, float)) and not isinstance(value, bool)
        if number and isinstance(value, float) and not math.isfinite(value):      # (ints are finite: bounds follow)
            raise _expected(self, "a finite number", given)
        if number and self.minimum is not None and value < self.minimum:
            raise _expected(self, f"at least {_bound(self.minimum)}", given)
        if number and self.maximum is not None and value > self.maximum:
            raise _expected(self, f"at most {_bound(self.maximum)}", given)
        return value
