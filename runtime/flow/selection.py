"""The channel-selection language of links and per-channel blocks (docs/flow-files.md).

A selection is ``"all"``, or one item or a list of items, each a channel
number (``3``; a negative one counts down from the centre, ``-1`` being
channel M-1, the next one below it), an inclusive range of numbers
(``"2..7"``, or ``"-3..3"`` for a band that runs across the centre), a
frequency with its unit (``"156.8 MHz"``), which picks the channel whose
centre is nearest, within a tolerance (default 5 % of the channel spacing),
or a frequency range (``"156.0 MHz..156.4 MHz"``: every channel whose centre
lies inside it, lowest first). The result is a list of column positions in
the stream's channels, in the order given. (``"rest"``, every channel no
other selection from the same output takes, needs the whole flow and is
resolved in :mod:`.expansion`.)
"""

from __future__ import annotations

import re
from typing import Any

from bandloom.blocks.block import StreamInfo, toml_repr
from bandloom.blocks.units import UnitError, format_frequency, parse_quantity

__all__ = ["DEFAULT_TOLERANCE_FRACTION", "SelectionError", "resolve_selection"]

DEFAULT_TOLERANCE_FRACTION = 0.05
_RANGE = re.compile(r"\s*-?\d+\s*\.\.\s*-?\d+\s*\Z")
_WHAT = "expected a channel number, a range \"A..B\", a frequency or \"all\""


class SelectionError(ValueError):
    """A selection that cannot be resolved against its stream; the message says what would do."""


def _pick_frequency(item: str, stream: StreamInfo, limit: float) -> int:
    try:
        hz = parse_quantity(item, "Hz")
    except UnitError:
        raise SelectionError(f"expected a channel number, a range \"A..B\", a frequency such as "
                             f"\"156.8 MHz\" or \"all\", got {toml_repr(item)}") from None
    if not re.search(r"[A-Za-z]", item):
        raise SelectionError(f"{item!r} has no unit: write a channel number without quotes, or a "
                             f"frequency with its unit such as \"{item} MHz\"")
    centres = stream.channel_frequencies
    nearest = min(range(len(stream.channels)), key=lambda c: abs(centres[c] - hz))
    distance = abs(centres[nearest] - hz)
    if distance > limit:
        raise SelectionError(f"{format_frequency(hz)} is {format_frequency(distance)} from the nearest "
                             f"channel centre, {format_frequency(centres[nearest])} (channel "
                             f"{stream.channels[nearest]}); the tolerance is {format_frequency(limit)} — pick a "
                             f"channel centre or set 'tolerance'")
    return stream.channels[nearest]


def _number(n: int, stream: StreamInfo, available: str) -> int:
    """A channel number as the stream numbers it: a negative one counts down from the centre (n + M)."""
    m = stream.channel_count
    if n < 0 and m and -m <= n:
        n += m
    if n not in stream.channels:
        raise SelectionError(f"channel {n} does not exist: the stream has {available}")
    return n


def _frequency_range(item: str, stream: StreamInfo) -> list[int]:
    ends = item.split("..")
    if len(ends) != 2:
        raise SelectionError(f"expected a range of two ends \"A..B\", such as \"2..7\" or \"156.0 MHz..156.4 "
                             f"MHz\", got {toml_repr(item)} ({len(ends)} ends)")
    low_text, high_text = ends
    try:
        low, high = parse_quantity(low_text, "Hz"), parse_quantity(high_text, "Hz")
    except UnitError:
        raise SelectionError(f"expected a range of channel numbers \"A..B\" or of frequencies such as "
                             f"\"156.0 MHz..156.4 MHz\", got {toml_repr(item)}") from None
    if not (re.search(r"[A-Za-z]", low_text) and re.search(r"[A-Za-z]", high_text)):
        raise SelectionError(f"{toml_repr(item)}: give both ends of a frequency range with their unit")
    if high < low:
        raise SelectionError(f"frequency range {toml_repr(item)} runs backwards; write "
                             f"\"{high_text.strip()}..{low_text.strip()}\"")
    inside = sorted((f, c) for f, c in zip(stream.channel_frequencies, stream.channels) if low <= f <= high)
    if not inside:
        raise SelectionError(f"no channel centre lies in {format_frequency(low)} .. {format_frequency(high)}")
    return [c for _, c in inside]


def _channels_of(item: Any, stream: StreamInfo, limit: float, available: str) -> list[int] | range:
    if isinstance(item, bool):
        raise SelectionError(f"{_WHAT}, got {toml_repr(item)}")
    if isinstance(item, int):
        return [_number(item, stream, available)]
    if isinstance(item, str) and _RANGE.match(item):
        a, b = (int(v) for v in item.split(".."))
        if b < a:
            m = stream.channel_count
            if m and 0 <= b < m // 2 <= a < m:
                hint = (f"to run across the centre write \"{a - m}..{b}\" (negative numbers count down from "
                        f"the centre); for channels {b} to {a} write \"{b}..{a}\"")
            else:
                hint = f"write \"{b}..{a}\""
            raise SelectionError(f"range {item!r} runs backwards; {hint}")
        for end in (a, b):         # both ends first: a range is never longer than the stream is wide
            _number(end, stream, available)
        return [_number(n, stream, available) for n in range(a, b + 1)]
    if isinstance(item, str) and ".." in item:
        return _frequency_range(item, stream)
    if isinstance(item, str):
        return [_pick_frequency(item, stream, limit)]
    raise SelectionError(f"{_WHAT}, got {toml_repr(item)}")


def resolve_selection(select: Any, stream: StreamInfo, tolerance: float | None = None) -> list[int]:
    """Columns of ``stream`` picked by ``select`` (None or "all": every column); SelectionError otherwise.

    >>> s = StreamInfo("channels", "cf32", 1e5, 0.0, channels=(0, 1, 2, 3),
    ...                channel_frequencies=(0.0, 1e5, -2e5, -1e5), channel_spacing=1e5)
    >>> resolve_selection(["1..2", "-100 kHz"], s)
    [1, 2, 3]
    """
    if select is None or select == "all":
        return list(range(len(stream.channels)))
    items = select if isinstance(select, list) else [select]
    if not items:
        raise SelectionError("the selection is empty")
    lookup = {c: i for i, c in enumerate(stream.channels)}
    limit = tolerance if tolerance is not None else DEFAULT_TOLERANCE_FRACTION * stream.channel_spacing
    available = (f"channels {min(stream.channels)}..{max(stream.channels)}" if stream.channels else "no channels")
    columns: list[int] = []
    taken: set[int] = set()
    for item in items:
        for channel in _channels_of(item, stream, limit, available):
            if channel not in lookup:
                raise SelectionError(f"channel {channel} does not exist: the stream has {available}")
            if lookup[channel] in taken:
                raise SelectionError(f"channel {channel} is selected twice")
            columns.append(lookup[channel])
            taken.add(lookup[channel])
    return columns
