"""Plain-numpy reference kernels for the polyphase banks.

These are the slow, obviously-correct versions of the two hot loops. The fast
numba versions in ``_polyphase_fast`` take exactly the same arguments and must
produce the same numbers; the tests hold them to each other, and hold these to
scipy's ``upfirdn`` brute force.

Both kernels work on one chunk of frames and never allocate more than
``_MAX_BLOCK_ELEMENTS`` temporary elements at once.
"""

from __future__ import annotations

import numpy as np
from numpy.lib.stride_tricks import sliding_window_view

_MAX_BLOCK_ELEMENTS = 1 << 22


def prepare_fold_taps(taps: np.ndarray, channels: int) -> np.ndarray:
    """Taps in the form ``fold_frames`` wants: reversed, float64 (any ``channels``)."""
    return np.asarray(taps, dtype=np.float64)[::-1].copy()


def prepare_spread_taps(taps: np.ndarray, channels: int) -> np.ndarray:
    """Taps in the form ``spread_frames`` wants: float64 (any ``channels``)."""
    return np.asarray(taps, dtype=np.float64).copy()


def fold_frames(buffer: np.ndarray, prepared_taps: np.ndarray, channels: int, starts: np.ndarray, offsets: np.ndarray,
                out: np.ndarray) -> None:
    """Weight and fold frames of ``buffer`` into ``out`` (overwritten).

    ``prepared_taps`` comes from ``prepare_fold_taps(taps, channels)``. For frame ``f``
    the window is ``buffer[starts[f] : starts[f] + L]`` (L taps); its sample
    ``j`` is weighted by ``taps[L - 1 - j]`` and added to
    ``out[f, (offsets[f] + j) % channels]``. ``offsets[f]`` is the absolute
    index of the window's first sample modulo ``channels``, so every weighted
    sample lands in the bin of its absolute index modulo M. ``out`` is complex
    with shape ``(len(starts), channels)``.
    """
    L = len(prepared_taps)
    M = channels
    padded = -(-L // M) * M
    reversed_taps = np.zeros(padded, dtype=np.float64)
    reversed_taps[padded - L:] = prepared_taps
    windows_all = sliding_window_view(np.asarray(buffer, dtype=np.complex128), L)
    rows = max(1, _MAX_BLOCK_ELEMENTS // padded)
    columns = np.arange(M)
    for first in range(0, len(starts), rows):
        sel = slice(first, first + rows)
        windows = np.zeros((len(starts[sel]), padded), dtype=np.complex128)
        windows[:, padded - L:] = windows_all[starts[sel]]
        windows *= reversed_taps
        folded = windows.reshape(len(windows), padded // M, M).sum(axis=1)
        # folded[:, j] holds absolute index (offsets - (padded - L) + j) mod M.
        shift = (np.asarray(offsets[sel]) - (padded - L)) % M
        gather = (columns[None, :] - shift[:, None]) % M
        out[sel] = np.take_along_axis(folded, gather, axis=1)


def spread_frames(frames: np.ndarray, prepared_taps: np.ndarray, decimation: int, channels: int, phase: int,
                  out: np.ndarray, start: int = 0, stop: int | None = None) -> None:
    """Overlap-add periodic frames into ``out`` (added in place), only into ``out[start:stop]``.

    ``prepared_taps`` comes from ``prepare_spread_taps(taps, channels)``.
    ``frames`` has shape ``(F, channels)``; frame ``f`` is a period-M sequence
    and starts ``f * decimation`` samples into ``out``. Output sample
    ``f * decimation + j`` gains ``taps[j] * frames[f, (phase + f * decimation + j) % M]``
    for ``j`` in ``0 .. len(taps) - 1``. ``phase`` is the absolute index of
    ``out[0]`` modulo M. ``out`` needs ``(F - 1) * decimation + len(taps)`` samples. Samples outside
    ``[start, stop)`` gain nothing (so threads can share ``out``, each its own range, every sample summed
    over the frames in the same order as in one call).
    """
    stop = len(out) if stop is None else stop
    g = prepared_taps
    L = len(g)
    M = channels
    D = decimation
    j = np.arange(L)
    rows = max(1, _MAX_BLOCK_ELEMENTS // max(L, 1))
    frames = np.asarray(frames, dtype=np.complex128)
    for first in range(0, len(frames), rows):
        block = frames[first:first + rows]
        f = np.arange(first, first + len(block))
        index = (phase + f[:, None] * D + j[None, :]) % M
        contributions = g[None, :] * np.take_along_axis(block, index, axis=1)
        target = f[:, None] * D + j[None, :]
        inside = (target >= start) & (target < stop)
        np.add.at(out, target[inside], contributions[inside])
