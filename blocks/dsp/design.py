"""Bank design: prototype low-pass, matching synthesis taps, delay and figures.

``design_bank`` returns a :class:`BankDesign` whose ``analysis_taps`` feed an
:class:`~bandloom.blocks.dsp.banks.AnalysisBank` and whose ``synthesis_taps``
feed the matching :class:`~bandloom.blocks.dsp.banks.SynthesisBank`, such that
``synthesis(analysis(x))[m + delay] == x[m]`` up to ``round_trip_error_db``.

Shapes (the ``shape`` knob)
---------------------------
* ``"root-raised-cosine"`` (default when oversampled, ``M // D >= 2``): a
  root-raised-cosine pulse with symbol period ``M`` samples (so its power
  response is -3 dB at the channel edge and the channels' powers add to a
  constant), shaped by a window, then made exactly tight for the lattice
  ``(D, M)`` with the Zak-transform recipe of :mod:`.frames`. The window-shaped
  pulse occupies the middle ``taps_per_branch - 2 * tight_margin`` branches;
  the tight window is allowed ``tight_margin`` branches either side to spread
  into, which is what keeps its truncation error small.
* ``"low-pass"`` (default when critically sampled): a windowed-sinc low-pass
  with its -6 dB point at the channel edge (``scipy.signal.firwin``). Good
  for analysis; a round trip through it is not exact, and the design says
  by how much.
* ``"rectangle"``: ``M`` equal taps, the plain FFT bank. Reconstructs exactly
  at ``D = M`` but leaks (-13 dB sidelobes, 3.9 dB scalloping).

Why critical sampling cannot reconstruct sharp channels exactly: at ``D = M``
the channel spacing equals the channel rate, so any response wider than one
spacing aliases into its neighbour after decimation, and a DFT bank has no
cancelling partner for that alias; the only exact solutions are windows no
longer than ``M`` samples, whose spectra are wide and leaky. Oversampling by
2 moves the aliases two spacings away, beyond a stopband that starts at one.

Synthesis taps are the analysis taps reversed about ``delay`` (a multiple of
``M``, the smallest that keeps them causal) and scaled so the round-trip gain
is exactly 1: ``g[t] = c * h[delay - t]``.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from functools import cached_property
from typing import Any

import numpy as np

from .banks import AnalysisBank, SynthesisBank, _check_geometry
from .errors import ParameterError
from .figures import ResponseFigures, response_figures
from .frames import RoundTrip, frame_bounds, round_trip_transfer, tight_window

__all__ = [
    "BankDesign", "DEFAULT_CRITICAL_STOPBAND_DB", "DEFAULT_CRITICAL_TAPS_PER_BRANCH", "DEFAULT_ROLLOFF",
    "DEFAULT_STOPBAND_DB", "DEFAULT_TAPS_PER_BRANCH", "DEFAULT_TIGHT_MARGIN", "MAX_DESIGN_CHANNELS", "SHAPES",
    "design_bank", "root_raised_cosine"
]

SHAPES = ("root-raised-cosine", "low-pass", "rectangle")

#: The most channels a design is made for: 2^18, far past any flow's channelizer (the flow parameters
#: have their own limit); the default design at 2^18 took 11 s on the development machine. Without a
#: limit, a huge count met numpy's "maximum allowed size" error, which named no parameter.
MAX_DESIGN_CHANNELS = 1 << 18

DEFAULT_TAPS_PER_BRANCH = 16
DEFAULT_ROLLOFF = 0.5
DEFAULT_STOPBAND_DB = 95.0
DEFAULT_TIGHT_MARGIN = 2
DEFAULT_CRITICAL_TAPS_PER_BRANCH = 8
DEFAULT_CRITICAL_STOPBAND_DB = 90.0


def root_raised_cosine(t: np.ndarray, rolloff: float) -> np.ndarray:
    """Root-raised-cosine pulse at ``t`` symbol periods (unit energy per symbol).

    The textbook closed form, with its two removable singularities at
    ``t = 0`` and ``|t| = 1 / (4 * rolloff)`` filled in [common practice].
    """
    t = np.asarray(t, dtype=np.float64)
    a = float(rolloff)
    if a == 0:
        return np.sinc(t)
    with np.errstate(divide="ignore", invalid="ignore"):
        value = (np.sin(np.pi * t * (1 - a)) + 4 * a * t * np.cos(np.pi * t * (1 + a))) / (
            np.pi * t * (1 - (4 * a * t) ** 2))
    value = np.where(np.isclose(t, 0.0), 1 - a + 4 * a / np.pi, value)
    at_pole = np.isclose(np.abs(t), 1 / (4 * a))
    pole_value = a / np.sqrt(2) * ((1 + 2 / np.pi) * np.sin(np.pi / (4 * a))
                                   + (1 - 2 / np.pi) * np.cos(np.pi / (4 * a)))
    return np.where(at_pole, pole_value, value)


def _window(window: str, length: int, stopband_db: float) -> np.ndarray:
    import scipy.signal
    if window == "kaiser":
        return scipy.signal.windows.kaiser(length, scipy.signal.kaiser_beta(stopband_db), sym=True)
    try:
        return scipy.signal.get_window(window, length, fftbins=False)
    except ValueError as error:
        raise ParameterError(f"Parameter window={window!r} is not a window scipy.signal.get_window knows: {error}",
                             param="window") from error


@dataclass(frozen=True)
class BankDesign:
    """A matched analysis/synthesis pair and its figures (see module doc)."""

    channels: int
    decimation: int
    shape: str
    window: str
    taps_per_branch: int
    rolloff: float | None
    stopband_db: float | None
    tight: bool
    analysis_taps: np.ndarray = field(repr=False)
    synthesis_taps: np.ndarray = field(repr=False)
    delay: int

    @property
    def oversampling(self) -> int:
        return self.channels // self.decimation

    @property
    def passband_edge(self) -> float:
        """Edge of the flat part, channel spacings: ``(1 - rolloff) / 2`` or 0.25."""
        if self.shape == "root-raised-cosine" and self.rolloff is not None:
            return (1 - self.rolloff) / 2
        return 0.25

    @cached_property
    def response(self) -> ResponseFigures:
        """Figures of the analysis prototype (:func:`.figures.response_figures`)."""
        return response_figures(self.analysis_taps, self.channels, passband_edge=self.passband_edge)

    @cached_property
    def frame_bounds(self) -> tuple[float, float]:
        """``(A, B)`` of the analysis taps on this lattice (:func:`.frames.frame_bounds`)."""
        return frame_bounds(self.analysis_taps, self.channels, self.decimation)

    @cached_property
    def round_trip(self) -> RoundTrip:
        """Exact steady-state round trip (:func:`.frames.round_trip_transfer`), float64."""
        return round_trip_transfer(self.analysis_taps, self.synthesis_taps,
                                   self.channels, self.decimation, self.delay)

    @property
    def round_trip_error_db(self) -> float:
        """Relative RMS round-trip error for white input, dB (float64 arithmetic)."""
        return self.round_trip.error_db

    def analysis_bank(self, *, kernel: str = "fast", threads: int = 1) -> AnalysisBank:
        return AnalysisBank(self.channels, self.decimation, self.analysis_taps, kernel=kernel, threads=threads)

    def synthesis_bank(self, *, kernel: str = "fast", threads: int = 1) -> SynthesisBank:
        return SynthesisBank(self.channels, self.decimation, self.synthesis_taps, kernel=kernel, threads=threads)

    def figures(self) -> dict[str, Any]:
        """All figures as a flat dict of plain numbers and strings (for tables and JSON)."""
        a, b = self.frame_bounds
        out = {
            "channels": self.channels,
            "decimation": self.decimation,
            "oversampling": self.oversampling,
            "shape": self.shape,
            "window": self.window,
            "rolloff": self.rolloff,
            "stopband_db": self.stopband_db,
            "tight": self.tight,
            "delay_samples": self.delay,
            "round_trip_error_db": self.round_trip_error_db,
            "frame_bound_a": a,
            "frame_bound_b": b,
            "frame_condition": b / a if a > 0 else float("inf"),
            "multiplies_per_input_sample": self.oversampling * (
                len(self.analysis_taps) + self.channels / 2 * np.log2(self.channels)) / self.channels,
        }
        out.update(self.response.as_dict())
        return out


def _validate_number(name: str, value: Any, low: float, high: float, *, integer: bool = False) -> Any:
    if isinstance(value, bool) or not isinstance(value, (int, float, np.integer, np.floating)):
        raise ParameterError(f"Parameter {name}={value!r} is not a number!", param=name)
    if integer and int(value) != value:
        raise ParameterError(f"Parameter {name}={value!r} is not a whole number!", param=name)
    if not low <= value <= high:
        raise ParameterError(f"Parameter {name}={value!r} is outside {low} .. {high}!", param=name)
    return int(value) if integer else float(value)


def design_bank(channels: int, decimation: int | None = None, *, oversample: int | None = None,
                shape: str | None = None, taps_per_branch: int | None = None, rolloff: float | None = None,
                stopband_db: float | None = None, window: str = "kaiser", tight: bool | None = None,
                tight_margin: int | None = None) -> BankDesign:
    """Design a matched analysis/synthesis pair; see the module doc for the shapes.

    Parameters
    ----------
    channels : int
        Number of channels M (>= 2).
    decimation : int, optional
        Decimation D, dividing M. Give this or ``oversample``, not both.
    oversample : int, optional, keyword-only
        M // D; the default is 2 (twice oversampled).
    shape : {"root-raised-cosine", "low-pass", "rectangle"}, optional
        Prototype shape; default root-raised-cosine when oversampled, low-pass when critically sampled.
    taps_per_branch, rolloff, stopband_db, window, tight, tight_margin : optional
        Knobs of the shape; None takes the shape's default: root-raised-cosine 16 taps per
        branch, rolloff 0.5, Kaiser window for 95 dB, tight with 2 margin branches; low-pass
        8 taps per branch, Kaiser window for 90 dB. A knob that does not apply to the shape
        is refused.

    Returns
    -------
    BankDesign
        Analysis and synthesis taps, the round-trip delay (a multiple of M) and figures.

    Raises
    ------
    ParameterError
        Naming the parameter and the rule it broke.

    Examples
    --------
    >>> design = design_bank(64, oversample=2)
    >>> design.decimation, design.delay, len(design.analysis_taps)
    (32, 1024, 1025)
    >>> bool(design.response.adjacent_rejection_db > 110), bool(design.round_trip_error_db < -120)
    (True, True)
    >>> design_bank(64, oversample=3)
    Traceback (most recent call last):
    bandloom.blocks.dsp.errors.ParameterError: Parameter oversample=3 does not divide channels=64!
    """
    if isinstance(channels, bool) or not isinstance(channels, (int, np.integer)) or channels < 2:
        raise ParameterError(f"Parameter channels={channels!r} is not an integer >= 2!", param="channels")
    if channels > MAX_DESIGN_CHANNELS:
        shown = channels if channels < 10**20 else f"<a number of {len(str(channels))} digits>"
        raise ParameterError(f"Parameter channels={shown} is more than {MAX_DESIGN_CHANNELS}!", param="channels")
    if decimation is not None and oversample is not None:
        raise ParameterError("Give decimation or oversample, not both!", param="decimation")
    if decimation is None:
        oversample = 2 if oversample is None else oversample
        _validate_number("oversample", oversample, 1, channels, integer=True)
        if channels % int(oversample):
            raise ParameterError(f"Parameter oversample={oversample} does not divide channels={channels}!", param="oversample")
        decimation = channels // int(oversample)
    M, D = _check_geometry(channels, decimation, "decimation")
    p = M // D
    if shape is None:
        shape = "root-raised-cosine" if p >= 2 else "low-pass"
    if shape not in SHAPES:
        raise ParameterError(f"Parameter shape={shape!r} is not one of {list(SHAPES)}!", param="shape")

    if shape != "root-raised-cosine":
        for name, value in (("rolloff", rolloff), ("tight_margin", tight_margin)):
            if value is not None:
                raise ParameterError(f"Parameter {name}={value!r} applies to shape='root-raised-cosine' only!", param=name)
    if shape == "rectangle":
        taps = np.full(M, 1.0 / M)
        return _matched(M, D, shape, "rectangle", 1, None, None, False, taps)

    if shape == "root-raised-cosine":
        R = _validate_number("taps_per_branch", DEFAULT_TAPS_PER_BRANCH if taps_per_branch is None
                             else taps_per_branch, 2, 256, integer=True)
        a = _validate_number("rolloff", DEFAULT_ROLLOFF if rolloff is None else rolloff, 0.05, 1.0)
        att = _validate_number("stopband_db", DEFAULT_STOPBAND_DB if stopband_db is None
                               else stopband_db, 20, 200)
        tight = (p >= 2) if tight is None else bool(tight)
        margin = _validate_number("tight_margin", (DEFAULT_TIGHT_MARGIN if tight else 0)
                                  if tight_margin is None else tight_margin, 0, (R - 1) // 2, integer=True)
        core = (R - 2 * margin) * M + 1
        t = (np.arange(core) - (core - 1) / 2) / M
        pulse = root_raised_cosine(t, a) * _window(window, core, att)
        taps = np.pad(pulse, (margin * M, margin * M))
        if tight:
            taps = tight_window(taps, M, D)
            taps = (taps + taps[::-1]) / 2          # the exact tight window is symmetric too
        return _matched(M, D, shape, window, R, a, att, tight, taps / taps.sum())

    # low-pass
    R = _validate_number("taps_per_branch", DEFAULT_CRITICAL_TAPS_PER_BRANCH if taps_per_branch is None
                         else taps_per_branch, 1, 256, integer=True)
    att = _validate_number("stopband_db", DEFAULT_CRITICAL_STOPBAND_DB if stopband_db is None
                           else stopband_db, 20, 200)
    if tight:
        raise ParameterError("Parameter tight=True needs shape='root-raised-cosine'!", param="tight")
    import scipy.signal

    length = R * M + 1
    win = ("kaiser", scipy.signal.kaiser_beta(att)) if window == "kaiser" else window
    taps = scipy.signal.firwin(length, 1.0 / M, window=win)
    return _matched(M, D, shape, window, R, None, att, False, taps / taps.sum())


def _matched(M: int, D: int, shape: str, window: str, R: int, rolloff: float | None, stopband_db: float | None,
             tight: bool, taps: np.ndarray) -> BankDesign:
    taps = np.asarray(taps, dtype=np.float64)
    delay = M * (-(-(len(taps) - 1) // M))
    synthesis = np.zeros(delay + 1)
    synthesis[delay - np.arange(len(taps))] = taps
    gain = round_trip_transfer(taps, synthesis, M, D, delay).gain.real
    synthesis /= gain
    taps.flags.writeable = False
    synthesis.flags.writeable = False
    return BankDesign(channels=M, decimation=D, shape=shape, window=str(window), taps_per_branch=R,
                      rolloff=rolloff, stopband_db=stopband_db, tight=tight,
                      analysis_taps=taps, synthesis_taps=synthesis, delay=delay)
