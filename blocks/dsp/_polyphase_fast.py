"""numba kernels for the polyphase banks' hot loops.

Same functions, arguments and results as ``_polyphase_reference`` (see there
for the exact definitions), working on float32 views of complex64 data: a
complex slice ``[a, b)`` is the float slice ``[2a, 2b)``. The prepared taps
are float32 with every tap written twice, once for the I and once for the Q
float of its sample, so a multiply-add is one elementwise product of two
float slices of the same length: LLVM turns that into straight SIMD, where a
tap shared by two neighbouring floats needed a shuffle per vector (measured:
the fold 15-30 % faster at M = 256..4096, up to 2x at M = 64). The
multiply-adds live in small never-inlined functions on plain contiguous
slices (see ``_multiply_add``). The numba cache is on, so compilation happens
once per installation.
"""

from __future__ import annotations

import numpy as np
from numba import njit


@njit(cache=True, fastmath=True, nogil=True, inline="never")
def _multiply_add(acc, taps, samples) -> None:
    """acc += taps * samples, elementwise over float slices of one length (taps already doubled for I/Q).

    Kept as its own never-inlined function on plain slices: with offsets in
    the index expressions LLVM cannot prove the stores do not alias the
    loads and leaves the loop scalar (about 8x slower).
    """
    for k in range(acc.shape[0]):
        acc[k] += taps[k] * samples[k]


@njit(cache=True, fastmath=True, nogil=True, inline="never")
def _multiply_add_4(acc, h1, x1, h2, x2, h3, x3, h4, x4) -> None:
    """acc += h1*x1 + h2*x2 + h3*x3 + h4*x4: one load and store of acc for four rows of taps."""
    for k in range(acc.shape[0]):
        acc[k] += (h1[k] * x1[k] + h2[k] * x2[k]) + (h3[k] * x3[k] + h4[k] * x4[k])


@njit(cache=True, fastmath=True, nogil=True)
def _fold_jit(buffer2, doubled_taps, channels: int, starts, offsets, out2) -> None:
    """Float indices throughout: a frame's window starts at float 2 * starts[f], a row is 2M floats."""
    L2 = doubled_taps.shape[0]
    M2 = 2 * channels
    for f in range(starts.shape[0]):
        base = 2 * starts[f]
        row = out2[f]
        row[:] = 0.0          # zeroed here, while the row is in L1, rather than up front
        # The first run fills the row from the frame's fold offset to its end;
        # after it every run starts at position 0 and whole rows go four at a time.
        pos = 2 * offsets[f]
        j = min(M2 - pos, L2)
        _multiply_add(row[pos:pos + j], doubled_taps[0:j], buffer2[base:base + j])
        while j + 4 * M2 <= L2:
            s = base + j
            _multiply_add_4(row,
                            doubled_taps[j:j + M2], buffer2[s:s + M2],
                            doubled_taps[j + M2:j + 2 * M2], buffer2[s + M2:s + 2 * M2],
                            doubled_taps[j + 2 * M2:j + 3 * M2], buffer2[s + 2 * M2:s + 3 * M2],
                            doubled_taps[j + 3 * M2:j + 4 * M2], buffer2[s + 3 * M2:s + 4 * M2])
            j += 4 * M2
        while j < L2:
            run = min(M2, L2 - j)
            _multiply_add(row[0:run], doubled_taps[j:j + run], buffer2[base + j:base + j + run])
            j += run


@njit(cache=True, fastmath=True, nogil=True)
def _spread_jit(frames2, doubled_taps, decimation: int, channels: int, phase, out2, start: int, stop: int) -> None:
    n_taps = doubled_taps.shape[0] // 2
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
            _multiply_add(out2[2 * (base + j):2 * (base + j + run)], doubled_taps[2 * j:2 * (j + run)],
                          frame[2 * pos:2 * (pos + run)])
            j += run
            pos = 0


def prepare_fold_taps(taps: np.ndarray):
    """float32 taps, reversed, each written twice (I and Q)."""
    return np.repeat(np.asarray(taps, dtype=np.float64)[::-1].astype(np.float32), 2)


def prepare_spread_taps(taps: np.ndarray):
    """float32 taps, each written twice (I and Q)."""
    return np.repeat(np.asarray(taps, dtype=np.float32), 2)


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
