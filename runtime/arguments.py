"""argparse value types the commands share: numbers within a range, refused in one line naming the range.

Each returns a converter for ``type=``; a value outside its range (or not a number) is an
``ArgumentTypeError``, which argparse prints as ``bandloom COMMAND: error: argument --NAME: ...`` with
exit status 2. Non-finite numbers are outside every range.

>>> whole_number(1, 8)("3"), whole_numbers(2, 64)("8,16"), number_between(-200, 0, "dB")("-100")
(3, [8, 16], -100.0)
>>> whole_number(1, 8)("0")
Traceback (most recent call last):
argparse.ArgumentTypeError: '0' is not a whole number from 1 to 8
"""

from __future__ import annotations

import math
from argparse import ArgumentTypeError
from collections.abc import Callable

from bandloom.blocks.params import shortened

__all__ = ["number_between", "whole_number", "whole_numbers"]


def whole_number(low: int, high: int) -> Callable[[str], int]:
    """A whole number from ``low`` to ``high``."""
    def convert(text: str) -> int:
        try:
            value = int(text)
        except ValueError:
            value = low - 1
        if not low <= value <= high:
            raise ArgumentTypeError(f"{_shown(text)} is not a whole number from {low} to {high}")
        return value
    return convert


def whole_numbers(low: int, high: int) -> Callable[[str], list[int]]:
    """A comma list of whole numbers, each from ``low`` to ``high``."""
    one = whole_number(low, high)

    def convert(text: str) -> list[int]:
        values = [one(v.strip()) for v in text.split(",") if v.strip()]
        if not values:
            raise ArgumentTypeError(f"{_shown(text)} lists no number")
        return values
    return convert


def number_between(low: float, high: float, unit: str) -> Callable[[str], float]:
    """A number of ``unit`` (words for the message: "seconds", "dB") from ``low`` to ``high``."""
    def convert(text: str) -> float:
        try:
            value = float(text)
        except ValueError:
            value = math.nan
        if not low <= value <= high:
            raise ArgumentTypeError(f"{_shown(text)} is not a number of {unit} from {low:g} to {high:g}")
        return value
    return convert


def _shown(text: str) -> str:
    return repr(shortened(text, 40))
