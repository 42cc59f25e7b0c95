"""numba kernels for the polyphase banks' hot loops.

Same functions, arguments and results as ``_polyphase_reference`` (see there
for the exact definitions), working on float32 views of complex64 data: a
complex slice ``[a, b)`` is the float slice ``[2a, 2b)``, and each real tap
multiplies the I and Q floats of its sample. The multiply-adds live in small
never-inlined functions on plain contiguous slices (see ``_multiply_add``).
The numba cache is on, so compilation happens once per installation.
"""

from __future__ import annotations

import numpy as np
from numba import njit


@njit(cache=True, fastmath=True, nogil=True, inline="never")
def _multiply_add(acc, taps: np.ndarray, samples) -> None:
    """acc += taps * samples, taps real (n), acc and samples interleaved I/Q floats (2n).

    Kept as its own never-inlined function on plain slices: with offsets in
    the index expressions LLVM cannot prove the stores do not alias the
    loads and leaves the loop scalar (about 8x slower).
    """
    for t in range(taps.shape[0]):
        acc[2 * t] += taps[t] * samples[2 * t]
        acc[2 * t + 1] += taps[t] * samples[2 * t + 1]


@njit(cache=True, fastmath=True, nogil=True, inline="never")
def _multiply_add_4(acc, h1, x1, h2, x2, h3, x3, h4, x4) -> None:
    """acc += h1*x1 + h2*x2 + h3*x3 + h4*x4: one load and store of acc for four rows of taps."""
    for t in range(h1.shape[0]):
        acc[2 * t] += (h1[t] * x1[2 * t] + h2[t] * x2[2 * t]) + (h3[t] * x3[2 * t] + h4[t] * x4[2 * t])
        acc[2 * t + 1] += ((h1[t] * x1[2 * t + 1] + h2[t] * x2[2 * t + 1])
                           + (h3[t] * x3[2 * t + 1] + h4[t] * x4[2 * t + 1]))


@njit(cache=True, fastmath=True, nogil=True)
def _fold_jit(buffer2, reversed_taps, channels: int, starts, offsets, out2) -> None:
    taps = reversed_taps.shape[0]
    M = channels
    for f in range(starts.shape[0]):
        base = starts[f]
        row = out2[f]
        row[:] = 0.0          # zeroed here, while the row is in L1, rather than up front
        # The first run fills the row from the frame's fold offset to its end;
        # after it every run starts at position 0 and whole rows go four at a time.
        pos = offsets[f]
        j = min(M - pos, taps)
        _multiply_add(row[2 * pos:2 * (pos + j)], reversed_taps[0:j], buffer2[2 * base:2 * (base + j)])
        while j + 4 * M <= taps:
            s = base + j
            _multiply_add_4(row,
                            reversed_taps[j:j + M], buffer2[2 * s:2 * (s + M)],
                            reversed_taps[j + M:j + 2 * M], buffer2[2 * (s + M):2 * (s + 2 * M)],
                            reversed_taps[j + 2 * M:j + 3 * M], buffer2[2 * (s + 2 * M):2 * (s + 3 * M)],
                            reversed_taps[j + 3 * M:j + 4 * M], buffer2[2 * (s + 3 * M):2 * (s + 4 * M)])
            j += 4 * M
        while j < taps:
            run = min(M, taps - j)
            _multiply_add(row[0:2 * run], reversed_taps[j:j + run], buffer2[2 * (base + j):2 * (base + j + run)])
            j += run


@njit(cache=True, fastmath=True, nogil=True)
def _spread_jit(frames2, taps: np.ndarray, decimation: int, channels: int, phase, out2, start: int, stop: int) -> None:
    n_taps = taps.shape[0]
    M = channels
    for f in range(frames2.shape[0]):
        base = f * decimation
        j = max(0, start - base)            # only what lands in out[start:stop]
        end = min(n_taps, stop - base)
        if j >= end:
            continue
        pos = (phase + base + j) % M
        frame = frames2[f]
        while j < end:
            run = min(M - pos, end - j)
            _multiply_add(out2[2 * (base + j):2 * (base + j + run)], taps[j:j + run], frame[2 * pos:2 * (pos + run)])
            j += run
            pos = 0


def prepare_fold_taps(taps: np.ndarray):
    """float32 taps, reversed."""
    return np.ascontiguousarray(np.asarray(taps, dtype=np.float64)[::-1], dtype=np.float32)


def prepare_spread_taps(taps: np.ndarray):
    """float32 taps."""
    return np.ascontiguousarray(taps, dtype=np.float32)


def fold_frames(buffer, prepared_taps, channels: int, starts, offsets, out: np.ndarray) -> None:
    """Fast ``fold_frames``: ``buffer`` and ``out`` complex64 C-contiguous (``out`` overwritten)."""
    _fold_jit(buffer.view(np.float32), prepared_taps, channels,
              np.ascontiguousarray(starts, dtype=np.int64),
              np.ascontiguousarray(offsets, dtype=np.int64),
              out.view(np.float32))


def spread_frames(frames, prepared_taps, decimation: int, channels: int, phase, out: np.ndarray, start: int = 0,
                  stop: int | None = None) -> None:
    """Fast ``spread_frames``: ``frames`` and ``out`` complex64 C-contiguous (added to ``out``)."""
    _spread_jit(frames.view(np.float32), prepared_taps, decimation, channels,
                phase, out.view(np.float32), start, len(out) if stop is None else stop)
