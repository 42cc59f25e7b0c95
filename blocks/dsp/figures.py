"""Response figures of a prototype filter or window, and the bank cost model.

Frequencies here are in channel spacings (bins): 1.0 is ``fs / M``, the
distance between adjacent channel centres; 0.5 is a channel edge. Levels are
in dB relative to the response at the channel centre (frequency 0). For a
window of ``N`` points analysed as an ``N``-channel bank (``channels=N``) the
figures are the classic window figures of merit (Harris, Proc. IEEE 66(1),
1978, Table I).
"""

from __future__ import annotations

from dataclasses import asdict, dataclass
from typing import Any

import numpy as np

from .errors import ParameterError

__all__ = ["ResponseFigures", "cost_ratio", "frequency_response", "response_at", "response_figures"]


def _fft_size(length: int, channels: int, points_per_channel: int) -> int:
    size = max(points_per_channel * channels, 4 * length)
    return 1 << int(np.ceil(np.log2(size)))


def frequency_response(taps: np.ndarray, channels: int, *, points_per_channel: int = 64) -> tuple[np.ndarray, np.ndarray]:
    """Response on a dense grid: ``(offsets, response)``.

    ``offsets`` are channel spacings from the centre, ascending, covering the
    whole band ``[-M/2, M/2)``; ``response`` is complex and normalised so that
    the value at offset 0 is the taps' sum divided by itself (1 unless the taps
    sum to zero, in which case the raw response is returned).
    """
    taps = np.asarray(taps)
    size = _fft_size(len(taps), channels, points_per_channel)
    response = np.fft.fftshift(np.fft.fft(taps, size))
    offsets = np.fft.fftshift(np.fft.fftfreq(size)) * channels
    dc = taps.sum()
    if abs(dc) > 0:
        response = response / dc
    return offsets, response


def response_at(taps: np.ndarray, channels: int, offset: float) -> complex:
    """Exact response (DTFT) at ``offset`` channel spacings, relative to the centre."""
    taps = np.asarray(taps)
    n = np.arange(len(taps))
    value = np.sum(taps * np.exp(-2j * np.pi * offset * n / channels))
    return value / taps.sum()


def cost_ratio(taps_per_branch: float, channels: int) -> float:
    """Cost of a polyphase DFT bank relative to a bare M-point FFT per frame.

    ``1 + R / log2(M)`` for ``R`` taps per branch: per frame the bank does
    about ``L + (M/2) log2 M`` multiplies against ``(M/2) log2 M`` for the FFT
    (Schniter, "Computational Savings of Polyphase/DFT Filterbanks", OpenStax
    CNX m10930; see docs/dsp-conventions.md).
    """
    return 1.0 + taps_per_branch / np.log2(channels)


def _to_db(magnitude: Any) -> Any:
    return 20.0 * np.log10(np.maximum(magnitude, 1e-300))


def _crossing(offsets: np.ndarray, level_db: np.ndarray, threshold_db: float) -> float:
    """First positive offset where ``level_db`` falls to ``threshold_db`` (linear interpolation)."""
    positive = offsets >= 0
    f, level = offsets[positive], level_db[positive]
    below = np.nonzero(level <= threshold_db)[0]
    if len(below) == 0:
        return float("nan")
    i = below[0]
    if i == 0:
        return 0.0
    f0, f1, l0, l1 = f[i - 1], f[i], level[i - 1], level[i]
    return float(f0 + (threshold_db - l0) * (f1 - f0) / (l1 - l0))


@dataclass(frozen=True)
class ResponseFigures:
    """Figures of one prototype (see module doc for units).

    Attributes: ``channels``; ``taps``; ``taps_per_branch`` (L / M);
    ``passband_edge`` (the flat part is ``|f| <= passband_edge``);
    ``passband_ripple_db`` (peak to peak over the flat part); ``edge_3db`` and
    ``edge_6db`` (where the response first falls 3 and 6 dB, so the 3 dB
    bandwidth is ``2 * edge_3db``); ``adjacent_rejection_db`` (worst response
    at ``|f| >= 1``, as a positive rejection); ``alternate_rejection_db``
    (``|f| >= 2``); ``highest_sidelobe_db`` (highest peak beyond the first
    null, negative); ``scalloping_loss_db`` (loss of a tone at the channel
    edge, ``|f| = 0.5``, positive); ``enbw_bins`` (equivalent noise bandwidth);
    ``coherent_gain`` (``|sum h| / (L max|h|)``, the window's mean);
    ``worst_case_processing_loss_db`` (scalloping loss + 10 log10 ENBW);
    ``cost_ratio`` (1 + R / log2 M).
    """

    channels: int
    taps: int
    taps_per_branch: float
    passband_edge: float
    passband_ripple_db: float
    edge_3db: float
    edge_6db: float
    adjacent_rejection_db: float
    alternate_rejection_db: float
    highest_sidelobe_db: float
    scalloping_loss_db: float
    enbw_bins: float
    coherent_gain: float
    worst_case_processing_loss_db: float
    cost_ratio: float

    def as_dict(self) -> dict[str, float]:
        return asdict(self)


def response_figures(taps: np.ndarray, channels: int, *, passband_edge: float = 0.25,
                     points_per_channel: int = 64) -> ResponseFigures:
    """Compute :class:`ResponseFigures` for real or complex ``taps`` in an M-channel bank.

    ``passband_edge`` (channel spacings) bounds the flat part over which the
    ripple is measured; the default 0.25 is the middle half of the channel.
    """
    taps = np.asarray(taps)
    if taps.ndim != 1 or len(taps) == 0:
        raise ParameterError(f"Parameter taps must be a non-empty 1-D array, got shape {taps.shape}!", param="taps")
    if abs(taps.sum()) == 0:
        raise ParameterError("Parameter taps sums to zero: there is no passband to measure against!", param="taps")
    offsets, response = frequency_response(taps, channels, points_per_channel=points_per_channel)
    level = _to_db(np.abs(response))
    far = np.abs(offsets)
    flat = level[far <= passband_edge]
    adjacent = level[far >= 1.0]
    alternate = level[far >= 2.0]

    # Mainlobe: from the centre outwards past the -6 dB point (so passband
    # ripple is not taken for a null), then on to the first local minimum.
    centre = int(np.argmin(np.abs(offsets)))
    half = -20 * np.log10(2)
    right = centre
    while right + 1 < len(level) and (level[right] > half or level[right + 1] <= level[right]):
        right += 1
    left = centre
    while left - 1 >= 0 and (level[left] > half or level[left - 1] <= level[left]):
        left -= 1
    outside = np.concatenate([level[:left], level[right + 1:]])

    power = np.sum(np.abs(taps) ** 2)
    enbw = channels * power / abs(taps.sum()) ** 2
    scalloping = -_to_db(abs(response_at(taps, channels, 0.5)))
    return ResponseFigures(
        channels=int(channels),
        taps=int(len(taps)),
        taps_per_branch=len(taps) / channels,
        passband_edge=float(passband_edge),
        passband_ripple_db=float(flat.max() - flat.min()) if len(flat) else float("nan"),
        edge_3db=_crossing(offsets, level, -10 * np.log10(2)),
        edge_6db=_crossing(offsets, level, -20 * np.log10(2)),
        adjacent_rejection_db=float(-adjacent.max()) if len(adjacent) else float("inf"),
        alternate_rejection_db=float(-alternate.max()) if len(alternate) else float("inf"),
        highest_sidelobe_db=float(outside.max()) if len(outside) else float("-inf"),
        scalloping_loss_db=float(scalloping),
        enbw_bins=float(enbw),
        coherent_gain=float(abs(taps.sum()) / (len(taps) * np.abs(taps).max())),
        worst_case_processing_loss_db=float(scalloping + 10 * np.log10(enbw)),
        cost_ratio=float(cost_ratio(len(taps) / channels, channels)),
    )
