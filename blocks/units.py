"""Quantities with units, as written in flow files: "2.4 MHz", "25 kHz", "-30 dBFS", "1.5 s".

Each unit family has one base unit (Hz, s, dB, dBFS) and the values the
blocks see are plain floats in that base unit. A plain number means the base
unit. Prefixes are case-sensitive where SI makes them so (``mHz`` is not
``MHz``); the unit words are matched without regard to case otherwise.
"""

from __future__ import annotations

__all__ = ["UNIT_FAMILIES", "UnitError", "format_frequency", "parse_quantity"]

import math
import re

UNIT_FAMILIES = {
    "Hz": {"hz": 1.0, "khz": 1e3, "mhz": 1e6, "ghz": 1e9},
    "s": {"s": 1.0, "ms": 1e-3, "us": 1e-6, "µs": 1e-6, "ns": 1e-9, "min": 60.0, "h": 3600.0},
    "dB": {"db": 1.0},
    "dBFS": {"dbfs": 1.0},
}

UNIT_WORDS = {"Hz": ("Hz", "kHz", "MHz", "GHz"), "s": ("s", "ms", "us", "ns", "min", "h"),
              "dB": ("dB",), "dBFS": ("dBFS",)}

_QUANTITY = re.compile(r"^\s*([+-]?(?:\d+(?:\.\d*)?|\.\d+)(?:[eE][+-]?\d+)?)\s*([A-Za-zµ]*)\s*\Z")


class UnitError(ValueError):
    """A value that is not a number in the expected unit; the message says what would be right."""


def parse_quantity(value: object, unit: str) -> float:
    """Return ``value`` as a float in ``unit`` (a key of UNIT_FAMILIES), or raise UnitError."""
    family = UNIT_FAMILIES[unit]
    if isinstance(value, bool):
        raise UnitError(f"expected a number in {unit}, got {'true' if value else 'false'}")
    if isinstance(value, int) and abs(value) > 1e300:     # float() of it would overflow: no quantity is near
        raise UnitError(f"expected a finite number in {unit}, got a number of {len(str(abs(value)))} digits")
    if isinstance(value, (int, float)):
        return _finite(float(value), value, unit)
    if not isinstance(value, str):
        raise UnitError(f'expected a number in {unit} such as "{_example(unit)}", got {_quoted(value)}')
    match = _QUANTITY.match(value)
    if not match:
        raise UnitError(f'expected a number in {unit} such as "{_example(unit)}", got {_quoted(value)}')
    number, word = float(match.group(1)), match.group(2)
    if not word:
        return _finite(number, value, unit)
    if word == "mHz":
        raise UnitError(f"{_quoted(value)} is in millihertz; did you mean MHz?")
    scale = family.get(word.lower())
    if scale is None:
        known = ", ".join(UNIT_WORDS[unit])
        raise UnitError(f"{word!r} in {_quoted(value)} is not a unit of {unit}; use one of: {known}")
    return _finite(number * scale, value, unit)


def _finite(number: float, value: object, unit: str) -> float:
    if not math.isfinite(number):
        raise UnitError(f"expected a finite number in {unit}, got {_quoted(value)}")
    return number


def _quoted(value: object) -> str:
    return f'"{value}"' if isinstance(value, str) else repr(value)


def _example(unit: str) -> str:
    return {"Hz": "2.4 MHz", "s": "1.5 s", "dB": "60 dB", "dBFS": "-30 dBFS"}[unit]


def format_frequency(hz: float) -> str:
    """Frequency for people: '156.800 MHz', '25 kHz', '0 Hz'."""
    magnitude = abs(hz)
    for scale, word in ((1e9, "GHz"), (1e6, "MHz"), (1e3, "kHz")):
        if magnitude >= scale:
            text = f"{hz / scale:.6f}".rstrip("0")
            return f"{text}0 {word}" if text.endswith(".") else f"{text} {word}"
    return f"{hz:g} Hz"
