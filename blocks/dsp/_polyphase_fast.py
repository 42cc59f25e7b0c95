"""numba kernels for the polyphase banks' hot loops.

Same functions, arguments and results as ``_polyphase_reference`` (see there for the
exact definitions), but working on float32 views of complex64 data so that
the inner loops are plain contiguous multiply-adds that LLVM vectorises.
Each wrapper prepares the views; the ``_jit`` functions do the work.
The numba cache is on, so compilation happens once per installation.
"""

from __future__ import annotations

import numpy as np
from numba import njit


@njit(cache=True, fastmath=True, nogil=True, inline="never")
def _multiply_add(acc, a, b):
    """acc += a * b on equal-length contiguous float32 slices.

    Kept as its own never-inlined function on plain slices: with offsets in
    the index expressions LLVM cannot prove the stores do not alias the
    loads and leaves the loop scalar (about 8x slower).
    """
    for t in range(acc.shape[0]):
        acc[t] += a[t] * b[t]


@njit(cache=True, fastmath=True, nogil=True)
def _fold_jit(buffer2, reversed_taps2, channels, starts, offsets, out2):
    taps2 = reversed_taps2.shape[0]
    row2 = 2 * channels
    for f in range(starts.shape[0]):
        base = 2 * starts[f]
        pos = 2 * offsets[f]
        row = out2[f]
        j = 0
        while j < taps2:
            run = min(row2 - pos, taps2 - j)
            _multiply_add(row[pos:pos + run], reversed_taps2[j:j + run],
                          buffer2[base + j:base + j + run])
            j += run
            pos = 0


@njit(cache=True, fastmath=True, nogil=True)
def _spread_jit(frames2, taps2, decimation, channels, phase, out2):
    n_taps2 = taps2.shape[0]
    row2 = 2 * channels
    for f in range(frames2.shape[0]):
        base = 2 * f * decimation
        pos = 2 * ((phase + f * decimation) % channels)
        frame = frames2[f]
        j = 0
        while j < n_taps2:
            run = min(row2 - pos, n_taps2 - j)
            _multiply_add(out2[base + j:base + j + run], taps2[j:j + run],
                          frame[pos:pos + run])
            j += run
            pos = 0


def prepare_fold_taps(taps):
    """float32 taps, reversed, every value twice (for I and Q)."""
    return np.repeat(np.asarray(taps, dtype=np.float64)[::-1], 2).astype(np.float32)


def prepare_spread_taps(taps):
    """float32 taps, every value twice (for I and Q)."""
    return np.repeat(np.asarray(taps, dtype=np.float64), 2).astype(np.float32)


def fold_frames(buffer, prepared_taps, channels, starts, offsets, out):
    """Fast ``fold_frames``: ``buffer`` and ``out`` complex64 C-contiguous."""
    _fold_jit(buffer.view(np.float32), prepared_taps, channels,
              np.ascontiguousarray(starts, dtype=np.int64),
              np.ascontiguousarray(offsets, dtype=np.int64),
              out.view(np.float32))


def spread_frames(frames, prepared_taps, decimation, channels, phase, out):
    """Fast ``spread_frames``: ``frames`` and ``out`` complex64 C-contiguous."""
    _spread_jit(frames.view(np.float32), prepared_taps, decimation, channels,
                phase, out.view(np.float32))
