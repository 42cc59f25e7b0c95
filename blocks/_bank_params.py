"""Design knobs shared by the channelizer and synthesis blocks, and the designs made from them.

A design is made once per process (:func:`make_design` remembers it) and can be
handed to other processes as a file (:func:`save_designs`, then ``make_design(...,
folder=...)`` loads it): a run's supervisor checks the flow, so it has designed
every bank already, and writes them into the run's private folder; a worker
then starts without designing again (or importing ``scipy.signal``, the larger
part of a channelizer's start-up).

Designs are also kept between runs in the user's design cache
(``$BANDLOOM_CACHE_DIR``, else ``$XDG_CACHE_HOME/bandloom/designs``, else
``~/.cache/bandloom/designs``), so that checking a flow whose banks were
designed before takes no ``scipy.signal`` import (about a second) and no
design. A cached design is found by its knobs and by a fingerprint of the
code and libraries that made it (the design modules' source, numpy's and
scipy's versions): a change to any of them designs afresh. The folder is used
only if it is this user's own and nobody else can write to it; a file that
does not load is designed again. ``BANDLOOM_CACHE_DIR=off`` turns the cache off.
"""

from __future__ import annotations

import hashlib
import json
import os
import stat
import tempfile
import zipfile
from collections.abc import Mapping
from functools import cache
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
            _save(path, design)


def _load(path: Path) -> BankDesign | None:
    try:
        with np.load(path, allow_pickle=False) as saved:
            scalars = json.loads(str(saved["scalars"]))
            return BankDesign(**scalars, analysis_taps=saved["analysis_taps"], synthesis_taps=saved["synthesis_taps"])
    except (OSError, ValueError, KeyError, TypeError, EOFError, zipfile.BadZipFile):
        return None                    # damaged, or not a design this version wrote: make it again


def _save(path: Path, design: BankDesign) -> None:
    """Write ``design`` to ``path`` whole (a temporary file renamed), so a reader never sees half of it."""
    handle, temporary = tempfile.mkstemp(dir=path.parent, prefix=".design-", suffix=".npz")
    try:
        with os.fdopen(handle, "wb") as out:
            np.savez(out, analysis_taps=design.analysis_taps, synthesis_taps=design.synthesis_taps,
                     scalars=np.array(json.dumps({k: getattr(design, k) for k in _SCALARS})))
        os.replace(temporary, path)
    except OSError:
        Path(temporary).unlink(missing_ok=True)


@cache
def cache_folder() -> Path | None:
    """The user's design cache (see the module doc), made if need be; None when it is off, cannot be made,
    or is not this user's own with nobody else able to write to it."""
    setting = os.environ.get("BANDLOOM_CACHE_DIR", "")
    if setting == "off":
        return None
    if setting:
        folder = Path(setting)
    else:
        base = os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache")
        folder = Path(base) / "bandloom" / "designs"
    try:
        folder.mkdir(mode=0o700, parents=True, exist_ok=True)
        info = folder.stat()
    except OSError:
        return None
    if not stat.S_ISDIR(info.st_mode) or info.st_uid != os.getuid() or info.st_mode & 0o022:
        return None
    return folder


@cache
def _fingerprint() -> str:
    """What a cached design depends on besides its knobs: the design code's source and the libraries."""
    import scipy

    from .dsp import design, figures, frames
    digest = hashlib.sha256(f"{np.__version__} {scipy.__version__}".encode())
    for module in (design, figures, frames):
        digest.update(Path(module.__file__ or "").read_bytes())
    return digest.hexdigest()[:16]


def make_design(channels: int, oversample: int, knobs: Mapping[str, Any], *,
                folder: str | Path | None = None) -> BankDesign:
    """design_bank from block parameters, made once per process (or loaded from a design ``folder`` where
    the supervisor saved it, or from the user's design cache); ValueError becomes BlockError naming the
    parameter."""
    key = _key(channels, oversample, knobs)
    if key in _DESIGNS:
        return _DESIGNS[key]
    design = _load(Path(folder) / f"design-{key}.npz") if folder else None
    cached = cache_folder() if design is None else None
    if cached is not None:
        path = cached / f"design-{key}-{_fingerprint()}.npz"
        design = _load(path) if path.is_file() else None
        if design is None:
            design = _design(channels, oversample, knobs)
            _save(path, design)
    design = design or _design(channels, oversample, knobs)
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
