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
once per installation, but only when this module is imported as
``bandloom.blocks.dsp._polyphase_fast``: numba keys its cache by source file
and pickles the module's name into it, so a copy compiled while the file was
imported under another name (``blocks.dsp...`` from the source tree) made
every later run fail to load the cache with ModuleNotFoundError.

The fold cuts each window into rows of M samples (``FoldTaps``): frame ``n + M/D`` sees frame ``n``'s
window moved on by one row, so four such frames are folded together, each row of samples and of taps
loaded once for all four (register blocking, ``_set_4x4``); the folded rows are in window order and are
turned into absolute order as they are copied out. Measured against folding one frame at a time (2-core
AMD EPYC, 64 Ki-sample chunks, R = 8): 1.7-2.5x faster at M = 64..4096. The spread is the same sum seen
from the output (``_spread_jit``): 1.3-2x faster than one frame at a time.

Loops over a column range run over ``uint64`` indices: with a signed start numba adds a negative-index
test to every access and LLVM leaves the loop scalar (measured 5x slower).
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np
from numba import njit, uint64

#: numba's on-disk cache, only under the installed name (see the module doc).
_CACHE = __name__ == "bandloom.blocks.dsp._polyphase_fast"


@njit(cache=_CACHE, fastmath=True, nogil=True, inline="never")
def _multiply_add(acc, taps, samples) -> None:
    """acc += taps * samples, elementwise over float slices of one length (taps already doubled for I/Q).

    Kept as its own never-inlined function on plain slices: with offsets in
    the index expressions LLVM cannot prove the stores do not alias the
    loads and leaves the loop scalar (about 8x slower).
    """
    for k in range(acc.shape[0]):
        acc[k] += taps[k] * samples[k]


#: Floats added to the end of every row of taps and of the fold's scratch rows. A row of 2M floats is a
#: multiple of 4 KiB when M >= 512, so the same column of several rows would fall in one set of the
#: first-level cache and evict each other within one step of the loop; the skew spreads them over sets
#: (measured: the 4-frame kernels 2.5-3x slower without it at M = 512..4096).
_ROW_SKEW = 16


class FoldTaps(NamedTuple):
    """Taps in the form the fast ``fold_frames`` wants: the window cut into rows of M taps.

    The reversed taps are padded at the front with ``lead`` zeros to whole rows (``lead = rows * M - L``),
    so row ``q`` holds the weights of window samples ``q*M - lead .. (q+1)*M - lead - 1``; every tap is
    written twice (I and Q), and each row is ``2*M + _ROW_SKEW`` floats long (the skew is zeros).
    """
    rows: np.ndarray
    lead: int


class SpreadTaps(NamedTuple):
    """Taps in the form the fast ``spread_frames`` wants, every tap written twice (I and Q): the whole rows
    of M taps in reverse order (row 0 holds taps ``(full-1)*M .. full*M - 1``), each ``2*M + _ROW_SKEW``
    floats long, and the ``L mod M`` taps after them (``rest``)."""
    reversed_rows: np.ndarray
    rest: np.ndarray


@njit(cache=_CACHE, fastmath=True, nogil=True, inline="never")
def _set_4x4(acc, h, x, begin, end) -> None:
    """Four frames whose windows are one row apart, four rows of taps: for i < 4 and columns
    ``begin <= k < end``,
    ``acc[i, k] = sum_q h[q, k] * x[q + i, k]`` (q < 4).

    Each row of samples is loaded once for the four frames and each row of taps once for all of them:
    16 multiply-adds for 15 loads where one frame at a time needs 2 loads each. Whole 2-D arrays indexed
    from 0, so LLVM sees plain unit-stride loops it can vectorise.
    """
    for k in range(uint64(begin), uint64(end)):
        g0 = h[0, k]; g1 = h[1, k]; g2 = h[2, k]; g3 = h[3, k]                                    # noqa: E702
        y0 = x[0, k]; y1 = x[1, k]; y2 = x[2, k]; y3 = x[3, k]; y4 = x[4, k]; y5 = x[5, k]; y6 = x[6, k]  # noqa: E702
        acc[0, k] = (g0 * y0 + g1 * y1) + (g2 * y2 + g3 * y3)
        acc[1, k] = (g0 * y1 + g1 * y2) + (g2 * y3 + g3 * y4)
        acc[2, k] = (g0 * y2 + g1 * y3) + (g2 * y4 + g3 * y5)
        acc[3, k] = (g0 * y3 + g1 * y4) + (g2 * y5 + g3 * y6)


@njit(cache=_CACHE, fastmath=True, nogil=True, inline="never")
def _add_4x4(acc, h, x, begin, end) -> None:
    """As ``_set_4x4``, added to ``acc``."""
    for k in range(uint64(begin), uint64(end)):
        g0 = h[0, k]; g1 = h[1, k]; g2 = h[2, k]; g3 = h[3, k]                                    # noqa: E702
        y0 = x[0, k]; y1 = x[1, k]; y2 = x[2, k]; y3 = x[3, k]; y4 = x[4, k]; y5 = x[5, k]; y6 = x[6, k]  # noqa: E702
        acc[0, k] += (g0 * y0 + g1 * y1) + (g2 * y2 + g3 * y3)
        acc[1, k] += (g0 * y1 + g1 * y2) + (g2 * y3 + g3 * y4)
        acc[2, k] += (g0 * y2 + g1 * y3) + (g2 * y4 + g3 * y5)
        acc[3, k] += (g0 * y3 + g1 * y4) + (g2 * y5 + g3 * y6)


@njit(cache=_CACHE, fastmath=True, nogil=True, inline="never")
def _add_4x1(acc, h, x, begin, end) -> None:
    """Four frames, one row of taps: ``acc[i, k] += h[0, k] * x[i, k]``."""
    for k in range(uint64(begin), uint64(end)):
        g0 = h[0, k]
        acc[0, k] += g0 * x[0, k]
        acc[1, k] += g0 * x[1, k]
        acc[2, k] += g0 * x[2, k]
        acc[3, k] += g0 * x[3, k]


@njit(cache=_CACHE, fastmath=True, nogil=True, inline="never")
def _add_1x4(acc, h, x, begin, end) -> None:
    """One frame, four rows of taps, columns ``begin .. end - 1``: ``acc[0, k] += sum_q h[q, k] * x[q, k]``
    (the same sums as one row of ``_add_4x4``, so a row comes out the same either way)."""
    for k in range(uint64(begin), uint64(end)):
        acc[0, k] += (h[0, k] * x[0, k] + h[1, k] * x[1, k]) + (h[2, k] * x[2, k] + h[3, k] * x[3, k])


@njit(cache=_CACHE, fastmath=True, nogil=True, inline="never")
def _add_1x1(acc, h, x, begin, end) -> None:
    """One frame, one row of taps, columns ``begin .. end - 1`` (one row of ``_add_4x1``)."""
    for k in range(uint64(begin), uint64(end)):
        acc[0, k] += h[0, k] * x[0, k]


@njit(cache=_CACHE, fastmath=True, nogil=True, inline="never")
def _copy(target, source) -> None:
    """target[:] = source, as a plain loop (numba's slice assignment checks for overlap and copies twice)."""
    for k in range(target.shape[0]):
        target[k] = source[k]


@njit(cache=_CACHE, fastmath=True, nogil=True)
def _fold_group(buffer2, rows, lead: int, channels: int, starts, offsets, first: int, frames: int, step: int,
                acc, out2) -> None:
    """Fold ``frames`` frames (1 or 4): frame ``i`` is frame ``first + i * step``, whose window starts
    ``i`` rows after frame ``first``'s. Float indices throughout. They are summed in ``acc`` in window
    order (column 0 = padded position 0), then each is turned into absolute order in its row of ``out2``."""
    M2 = 2 * channels
    base = 2 * starts[first]
    first_full = 1 if lead > 0 else 0
    full = rows.shape[0] - first_full
    x0 = base + 2 * (first_full * channels - lead)       # the first whole row of frame 0's window
    extra = frames - 1                                   # rows the further frames need beyond frame 0's
    q = 0
    if frames == 4 and full >= 4:
        _set_4x4(acc, rows[first_full:first_full + 4], buffer2[x0:x0 + 7 * M2].reshape((7, M2)), 0, M2)
        q = 4
    else:
        acc[:frames, :] = 0.0
    while q < full:                                      # four rows of taps at a time, then one by one
        n = 4 if q + 4 <= full else 1
        s = x0 + q * M2
        samples = buffer2[s:s + (n + extra) * M2].reshape((n + extra, M2))
        taps = rows[first_full + q:first_full + q + n]
        if frames == 4:
            if n == 4:
                _add_4x4(acc, taps, samples, 0, M2)
            else:
                _add_4x1(acc, taps, samples, 0, M2)
        elif n == 4:
            _add_1x4(acc, taps, samples, 0, M2)
        else:
            _add_1x1(acc, taps, samples, 0, M2)
        q += n
    if lead > 0:                                         # the partial first row: window samples 0 .. M - lead - 1
        part = M2 - 2 * lead
        for i in range(frames):
            s = base + i * M2
            _multiply_add(acc[i, 2 * lead:M2], rows[0, 2 * lead:M2], buffer2[s:s + part])
    for i in range(frames):
        row = out2[first + i * step]
        turn = 2 * ((offsets[first + i * step] - lead) % channels)     # where window column 0 belongs
        _copy(row[turn:], acc[i, :M2 - turn])
        _copy(row[:turn], acc[i, M2 - turn:M2])


@njit(cache=_CACHE, fastmath=True, nogil=True)
def _fold_jit(buffer2, rows, lead: int, channels: int, starts, offsets, out2) -> None:
    """Frames whose windows lie whole rows apart are folded four at a time, the rest one by one.

    With ``step = M / (starts[1] - starts[0])``, frames ``b + r + i * step`` (i < 4) form a group for each
    block of ``4 * step`` frames from the first (``b``) and each ``r < step``; frames after the last whole
    block go one by one. (The banks' threads split a chunk's frames at multiples of ``4 * step``, so every
    frame is summed the same way with any number of threads.)
    """
    count = starts.shape[0]
    step = 0
    if count >= 2 and starts[1] > starts[0] and channels % (starts[1] - starts[0]) == 0:
        step = channels // (starts[1] - starts[0])
    grouped = count // (4 * step) * (4 * step) if step > 0 else 0
    acc = np.empty((4, 2 * channels + _ROW_SKEW), dtype=np.float32)
    for b in range(0, grouped, max(1, 4 * step)):
        for first in range(b, b + step):
            together = True
            for i in range(1, 4):
                together = together and starts[first + i * step] == starts[first] + i * channels
            if together:
                _fold_group(buffer2, rows, lead, channels, starts, offsets, first, 4, step, acc, out2)
            else:
                for i in range(4):
                    _fold_group(buffer2, rows, lead, channels, starts, offsets, first + i * step, 1, 1, acc, out2)
    for f in range(grouped, count):
        _fold_group(buffer2, rows, lead, channels, starts, offsets, f, 1, 1, acc, out2)


@njit(cache=_CACHE, fastmath=True, nogil=True, inline="never")
def _add_into(target, source, begin, end) -> None:
    """target[i, k] += source[i, k] for every row i of ``target`` and columns ``begin .. end - 1``."""
    for i in range(target.shape[0]):
        for k in range(uint64(begin), uint64(end)):
            target[i, k] += source[i, k]


@njit(cache=_CACHE, fastmath=True, nogil=True)
def _spread_block_row(z, taps, line: int, real_from: int, real_to: int, acc, begin: int, end: int) -> None:
    """One output row, one block of tap rows (``taps``, 1 to 4 rows): ``acc[0] += sum_q taps[q] *
    z[line + q]``, leaving out the rows of ``z`` outside ``real_from .. real_to - 1`` (rows of zeros,
    frames that do not exist). A whole block of four goes as one ``_add_1x4`` (the sums of ``_add_4x4``);
    a cut one row by row. So how a row is summed depends on the row alone."""
    width = taps.shape[0]
    if width == 4 and real_from <= line and line + 4 <= real_to:
        _add_1x4(acc, taps, z[line:line + 4], begin, end)
        return
    for q in range(width):
        if real_from <= line + q < real_to:
            _add_1x1(acc, taps[q:q + 1], z[line + q:line + q + 1], begin, end)


@njit(cache=_CACHE, fastmath=True, nogil=True)
def _spread_rows(z, reversed_rows, first: int, rows: int, real_from: int, real_to: int, acc, begin: int,
                 end: int) -> None:
    """Sum ``rows`` (1 or 4) output rows into ``acc[:rows]`` (zeroed first), columns ``begin .. end - 1``:
    output row ``a`` is ``sum_q reversed_rows[q] * z[first + a + q]``, the rows of ``z`` outside
    ``real_from .. real_to - 1`` left out (there are no frames there; ``first`` may be negative).

    The taps go in blocks of four rows. Where every row of ``z`` a block reads is real, the four output
    rows go together (``_add_4x4``: each row of ``z`` and of taps loaded once for all four); otherwise each
    output row on its own (``_spread_block_row``), with the same sums it gets when it comes alone.
    """
    full = reversed_rows.shape[0]
    acc[:rows, begin:end] = 0.0
    q = 0
    while q < full:
        width = min(4, full - q)
        taps = reversed_rows[q:q + width]
        line = first + q
        if rows == 4 and real_from <= line and line + width + 3 <= real_to:
            if width == 4:
                _add_4x4(acc, taps, z[line:line + 7], begin, end)
            else:
                for w in range(width):
                    _add_4x1(acc, taps[w:w + 1], z[line + w:line + w + 4], begin, end)
        else:
            for a in range(rows):
                _spread_block_row(z, taps, line + a, real_from, real_to, acc[a:a + 1], begin, end)
        q += width


@njit(cache=_CACHE, fastmath=True, nogil=True)
def _spread_jit(frames2, reversed_rows, rest_taps, decimation: int, channels: int, phase: int, out2,
                start: int, stop: int) -> None:
    """Add every frame's weighted periods into ``out[start:stop]``, output row by output row.

    The frames ``r, r + M/D, r + 2M/D, ...`` (one class ``r``) start their output whole rows apart, at
    sample ``r * D + j * M`` for the class's ``j``-th frame ``z[j]`` (turned so that its column 0 is the
    one that sample takes). Output row ``u`` of the class (M samples from ``r * D + u * M``) is then
    ``sum_q taps_row[q] * z[u - q]`` over the frames that exist: the sum a fold makes, over the class's
    frames laid out as rows, with the tap rows reversed. All frames of a class are turned alike; when
    they need no turning and the class is every frame (M/D = 1), ``frames2`` is used as it is. So the
    output rows go four at a time (``_spread_rows``: each row of frames and taps loaded once for all four),
    summed in a small scratch and then added to ``out``; rows cut by ``[start, stop)``
    go one by one, summed the same way, so every sample comes out the same however threads share the
    output. The taps' partial last row (``rest_taps``, when M does not divide L) is added frame by frame
    after.
    """
    M2 = 2 * channels
    full = reversed_rows.shape[0]
    rest = rest_taps.shape[0] // 2
    step = channels // decimation
    count = frames2.shape[0]
    acc = np.empty((4, M2 + _ROW_SKEW), dtype=np.float32)
    for r in range(min(step, count)):
        n = (count - r + step - 1) // step               # frames in the class
        offset = r * decimation                          # where the class's row 0 begins in out
        if stop <= offset:
            continue
        first_row = max(0, (start - offset) // channels)
        last_row = min(n + full - 2, (stop - 1 - offset) // channels) if full > 0 else -1
        if first_row <= last_row:
            # z[j]: the class's frame j turned; output row u reads z[u - (full - 1) .. u], of which only
            # rows 0 .. n - 1 exist (and only those are read)
            first_frame = max(0, first_row - (full - 1))
            last_frame = min(n - 1, last_row)
            turn0 = (phase + r * decimation) % channels  # the same for every frame of the class
            if step == 1 and turn0 == 0:
                z = frames2                              # already in order and turned: no copy
            else:
                z = np.empty((n, M2 + _ROW_SKEW), dtype=np.float32)
                turn = 2 * turn0
                for j in range(first_frame, last_frame + 1):
                    frame = r + j * step
                    _copy(z[j, 0:M2 - turn], frames2[frame, turn:M2])
                    _copy(z[j, M2 - turn:M2], frames2[frame, 0:turn])
            u = first_row
            while u <= last_row:
                begin_sample = offset + u * channels
                first = u - (full - 1)                   # z row of tap row 0 (reversed) for output row u
                if u + 3 <= last_row and start <= begin_sample and begin_sample + 4 * channels <= stop:
                    _spread_rows(z, reversed_rows, first, 4, 0, n, acc, 0, M2)
                    _add_into(out2[2 * begin_sample:2 * begin_sample + 4 * M2].reshape((4, M2)), acc, 0, M2)
                    u += 4
                    continue
                begin = 2 * max(0, start - begin_sample)
                end = 2 * min(channels, stop - begin_sample)
                _spread_rows(z, reversed_rows, first, 1, 0, n, acc, begin, end)
                _add_into(out2[2 * begin_sample:2 * begin_sample + M2].reshape((1, M2)), acc, begin, end)
                u += 1
        if rest > 0:                                     # the partial last row of taps, frame by frame
            for j in range(n):
                frame = r + j * step
                begin_sample = offset + (j + full) * channels
                begin = max(0, start - begin_sample)
                end = min(rest, stop - begin_sample)
                if begin < end:
                    turn = (phase + frame * decimation) % channels
                    k = begin
                    while k < end:                       # frame column (turn + k) mod M, in runs
                        column = (turn + k) % channels
                        run = min(end - k, channels - column)
                        _multiply_add(out2[2 * (begin_sample + k):2 * (begin_sample + k + run)],
                                      rest_taps[2 * k:2 * (k + run)], frames2[frame, 2 * column:2 * (column + run)])
                        k += run


def prepare_fold_taps(taps: np.ndarray, channels: int) -> FoldTaps:
    """The taps cut into rows of M for ``fold_frames`` (see ``FoldTaps``)."""
    length = len(taps)
    count = -(-length // channels)
    lead = count * channels - length
    padded = np.zeros(count * channels, dtype=np.float64)
    padded[lead:] = np.asarray(taps, dtype=np.float64)[::-1]
    rows = np.zeros((count, 2 * channels + _ROW_SKEW), dtype=np.float32)
    rows[:, :2 * channels] = np.repeat(padded.astype(np.float32), 2).reshape(count, 2 * channels)
    return FoldTaps(rows, lead)


def prepare_spread_taps(taps: np.ndarray, channels: int) -> SpreadTaps:
    """The taps cut into rows of M for ``spread_frames`` (see ``SpreadTaps``)."""
    doubled = np.repeat(np.asarray(taps, dtype=np.float64).astype(np.float32), 2)
    full = len(taps) // channels
    rows = np.zeros((full, 2 * channels + _ROW_SKEW), dtype=np.float32)
    rows[:, :2 * channels] = doubled[:full * 2 * channels].reshape(full, 2 * channels)[::-1]
    return SpreadTaps(rows, doubled[full * 2 * channels:].copy())


def fold_frames(buffer, prepared_taps: FoldTaps, channels: int, starts, offsets, out: np.ndarray) -> None:
    """Fast ``fold_frames``: ``buffer`` and ``out`` complex64 C-contiguous (``out`` overwritten)."""
    _fold_jit(buffer.view(np.float32), prepared_taps.rows, prepared_taps.lead, channels,
              np.ascontiguousarray(starts, dtype=np.int64),
              np.ascontiguousarray(offsets, dtype=np.int64),
              out.view(np.float32))


def spread_frames(frames, prepared_taps: SpreadTaps, decimation: int, channels: int, phase, out: np.ndarray,
                  start: int = 0, stop: int | None = None) -> None:
    """Fast ``spread_frames``: ``frames`` and ``out`` complex64 C-contiguous (added to ``out``)."""
    _spread_jit(frames.view(np.float32), prepared_taps.reversed_rows, prepared_taps.rest, decimation, channels,
                int(phase), out.view(np.float32), start, len(out) if stop is None else stop)
