"""Design knobs shared by the channelizer and synthesis blocks."""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

from .block import BlockError, Param
from .dsp.design import SHAPES, BankDesign, design_bank
from .dsp.errors import ParameterError

DESIGN_PARAMS = (
    Param("shape", "choice", "prototype shape (default: root-raised-cosine when oversampled, "
          "low-pass when critically sampled)", default=None, choices=SHAPES),
    Param("taps_per_branch", "int", "prototype length in multiples of the channel count (default 16, "
          "8 when critically sampled)", default=None, minimum=1, maximum=256),
    Param("rolloff", "float", "root-raised-cosine rolloff (default 0.5)", default=None,
          minimum=0.05, maximum=1.0),
    Param("stopband_db", "quantity", "attenuation the Kaiser window is designed for (default 95 dB, "
          "90 dB when critically sampled)", default=None, unit="dB", minimum=20, maximum=200),
    Param("window", "str", "window shaping the prototype, a name scipy.signal.get_window knows",
          default="kaiser"),
    Param("tight_margin", "int", "branches either side of the shaped pulse the tight window may spread into "
          "(root-raised-cosine; default 2)", default=None, minimum=0, maximum=64),
)

DESIGN_KEYS = tuple(p.name for p in DESIGN_PARAMS)


def make_design(channels: int, oversample: int, knobs: Mapping[str, Any]) -> BankDesign:
    """design_bank from block parameters; ValueError becomes BlockError naming the parameter."""
    if channels % oversample:
        divisors = [d for d in range(1, channels + 1) if channels % d == 0]
        raise BlockError(f"oversample = {oversample} does not divide channels = {channels} "
                         f"(choose one of {divisors})", param="oversample")
    try:
        values: dict[str, Any] = {k: knobs.get(k) for k in DESIGN_KEYS}
        return design_bank(channels, oversample=oversample, **values)
    except ParameterError as error:
        param = error.param if error.param in DESIGN_KEYS + ("oversample", "channels") else None
        raise BlockError(str(error), param=param) from None
