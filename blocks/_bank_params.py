"""Design knobs shared by the channelizer and synthesis blocks, and the designs made from them.

A design is made once per process (:func:`make_design` remembers it) and can be
handed to other processes as a file (:func:`save_designs`, then ``make_design(...,
folder=...)`` loads it): a run's supervisor checks the flow, so it has designed
every bank already, and writes them into the run's private folder; a worker
then starts without designing again (or importing ``scipy.signal``, the larger
part of a channelizer's start-up).
"""

from __future__ import annotations

import hashlib
import json
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import numpy as np

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


#: Designs made in this process, by their knobs.
_DESIGNS: dict[str, BankDesign] = {}
_SCALARS = ("channels", "decimation", "shape", "window", "taps_per_branch", "rolloff", "stopband_db", "tight", "delay")


def _key(channels: int, oversample: int, knobs: Mapping[str, Any]) -> str:
    values = {"channels": channels, "oversample": oversample, **{k: knobs.get(k) for k in DESIGN_KEYS}}
    return hashlib.sha256(json.dumps(values, sort_keys=True, default=str).encode()).hexdigest()[:24]


def save_designs(folder: str | Path) -> None:
    """Write every design this process has made into ``folder`` (one ``design-KEY.npz`` each)."""
    for key, design in _DESIGNS.items():
        path = Path(folder) / f"design-{key}.npz"
        if not path.exists():
            np.savez(path, analysis_taps=design.analysis_taps, synthesis_taps=design.synthesis_taps,
                     scalars=np.array(json.dumps({k: getattr(design, k) for k in _SCALARS})))


def _load(path: Path) -> BankDesign | None:
    try:
        with np.load(path, allow_pickle=False) as saved:
            scalars = json.loads(str(saved["scalars"]))
            return BankDesign(**scalars, analysis_taps=saved["analysis_taps"], synthesis_taps=saved["synthesis_taps"])
    except (OSError, ValueError, KeyError, TypeError):
        return None                    # not a design this version wrote: make it again


def make_design(channels: int, oversample: int, knobs: Mapping[str, Any], *,
                folder: str | Path | None = None) -> BankDesign:
    """design_bank from block parameters, made once per process (or loaded from a design ``folder`` where
    the supervisor saved it); ValueError becomes BlockError naming the parameter."""
    key = _key(channels, oversample, knobs)
    if key in _DESIGNS:
        return _DESIGNS[key]
    saved = _load(Path(folder) / f"design-{key}.npz") if folder else None
    design = saved or _design(channels, oversample, knobs)
    _DESIGNS[key] = design
    return design


def _design(channels: int, oversample: int, knobs: Mapping[str, Any]) -> BankDesign:
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
