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


@njit(cache=True, fastmath=True, nogil=True, inline="never")
def _multiply_add_4(acc, a1, b1, a2, b2, a3, b3, a4, b4):
    """acc += a1*b1 + a2*b2 + a3*b3 + a4*b4: one load and store of acc for four rows."""
    for t in range(acc.shape[0]):
        acc[t] += (a1[t] * b1[t] + a2[t] * b2[t]) + (a3[t] * b3[t] + a4[t] * b4[t])


@njit(cache=True, fastmath=True, nogil=True)
def _fold_jit(buffer2, reversed_taps2, channels, starts, offsets, out2):
    taps2 = reversed_taps2.shape[0]
    row2 = 2 * channels
    for f in range(starts.shape[0]):
        base = 2 * starts[f]
        row = out2[f]
        row[:] = 0.0          # zeroed here, while the row is in L1, rather than up front
        # The first run fills the row from the frame's fold offset to its end;
        # after it every run starts at position 0 and whole rows go four at a time.
        pos = 2 * offsets[f]
        j = min(row2 - pos, taps2)
        _multiply_add(row[pos:pos + j], reversed_taps2[0:j], buffer2[base:base + j])
        while j + 4 * row2 <= taps2:
            s = base + j
            _multiply_add_4(row,
                            reversed_taps2[j:j + row2], buffer2[s:s + row2],
                            reversed_taps2[j + row2:j + 2 * row2], buffer2[s + row2:s + 2 * row2],
                            reversed_taps2[j + 2 * row2:j + 3 * row2], buffer2[s + 2 * row2:s + 3 * row2],
                            reversed_taps2[j + 3 * row2:j + 4 * row2], buffer2[s + 3 * row2:s + 4 * row2])
            j += 4 * row2
        while j < taps2:
            run = min(row2, taps2 - j)
            _multiply_add(row[0:run], reversed_taps2[j:j + run], buffer2[base + j:base + j + run])
            j += run


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
