"""Streaming polyphase analysis (channelizer) and synthesis banks.

Conventions, used by every part of bandloom and every test
----------------------------------------------------------
* Samples are complex baseband IQ. Indices are absolute and start at 0: sample
  0 is the first sample ever given to ``process``; samples before it are 0.
* ``M`` channels, decimation/interpolation ``D`` (``D`` divides ``M``;
  ``M // D`` is the oversampling factor, 1 = critically sampled).
* Analysis, with prototype low-pass taps ``h[0 .. L-1]`` (real)::

      y[n, k] = sum_i h[i] * x[n*D - i] * exp(-2j*pi*k*(n*D - i)/M)

  i.e. mix channel ``k`` down to baseband, low-pass with ``h``, keep every
  D-th sample starting with sample 0. This is exactly
  ``scipy.signal.upfirdn(h, x * exp(-2j*pi*k*m/M), up=1, down=D)``.
  Because the mixing uses absolute time, frame ``n`` needs samples up to
  ``n*D``: after ``N`` input samples, ``ceil(N / D)`` frames exist.
* Channel ``k`` (FFT order) is centred at ``+k/M`` cycles per input sample for
  ``k < M/2`` and ``(k - M)/M`` for ``k >= M/2`` (``numpy.fft.fftfreq(M)``);
  positive offsets are above the stream's centre frequency. Its rate is
  ``1/D`` of the input rate.
* Synthesis, with taps ``g[0 .. L-1]`` (real; any scale folded into ``g``)::

      x_hat[m] = sum_k exp(+2j*pi*k*m/M) * sum_n Y[n, k] * g[m - n*D]

  i.e. upsample each channel by ``D``, filter with ``g``, mix up, sum. After
  ``F`` frames, ``F*D`` output samples are complete and returned.
* Streaming is chunk-invariant: any chunking of the same input gives the same
  output as one call.

Implementation: per output frame, the last ``L`` input samples are weighted by
the reversed taps and folded by absolute index modulo ``M`` (the polyphase
sum), then one M-point FFT. Synthesis is the mirror: one inverse FFT per
frame, then a weighted periodic overlap-add. The hot loops run in numba
(``kernel="fast"``, complex64 arithmetic) or in plain numpy
(``kernel="reference"``, float64 arithmetic, results rounded to complex64).
With ``threads=N`` the frames of a chunk are folded and transformed by N
threads, each its own share (analysis), or transformed by N of scipy.fft's own
threads and their output samples spread by N threads, each its own range
(synthesis); every number is computed exactly as with one thread, in the same
order, so the output is bit for bit the same.
"""

from __future__ import annotations

import threading
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from importlib import import_module
from types import ModuleType

import numpy as np

from .errors import ParameterError

__all__ = ["AnalysisBank", "SynthesisBank", "channel_offsets", "signed_channel"]

_KERNEL_MODULES = {"fast": "._polyphase_fast", "reference": "._polyphase_reference"}
_KERNEL_DTYPES = {"fast": np.complex64, "reference": np.complex128}


def _load_kernel(name: str) -> ModuleType:
    """The kernel module, imported on first use (numba takes a while to load)."""
    return import_module(_KERNEL_MODULES[name], __package__)


def _check_geometry(channels: int, step: int, step_name: str) -> tuple[int, int]:
    if isinstance(channels, bool) or not isinstance(channels, (int, np.integer)) or channels < 2:
        raise ParameterError(f"Parameter channels={channels!r} is not an integer >= 2!", param="channels")
    if isinstance(step, bool) or not isinstance(step, (int, np.integer)) or step < 1:
        raise ParameterError(f"Parameter {step_name}={step!r} is not an integer >= 1!", param=step_name)
    if channels % step:
        raise ParameterError(
            f"Parameter {step_name}={step} does not divide channels={channels}; "
            f"choose one of {[d for d in range(1, channels + 1) if channels % d == 0]}!", param=step_name)
    return int(channels), int(step)


def _check_taps(taps: np.ndarray) -> np.ndarray:
    array = np.asarray(taps)
    if array.ndim != 1 or array.size == 0:
        raise ParameterError(f"Parameter taps must be a non-empty 1-D array, got shape {array.shape}!", param="taps")
    if np.iscomplexobj(array):
        raise ParameterError("Parameter taps must be real; complex prototypes are not supported!", param="taps")
    array = array.astype(np.float64)
    if not np.all(np.isfinite(array)):
        raise ParameterError("Parameter taps contains NaN or infinity!", param="taps")
    array.flags.writeable = False
    return array


def _check_kernel(kernel: str) -> str:
    if kernel not in _KERNEL_MODULES:
        raise ParameterError(f"Parameter kernel={kernel!r} is not one of {sorted(_KERNEL_MODULES)}!", param="kernel")
    return kernel


#: The least work (taps x frames, or output samples x taps / interpolation) worth sharing between threads.
_MIN_SHARED_WORK = 1 << 18
_SHARES_PER_THREAD = 1


def _check_threads(threads: int) -> int:
    if isinstance(threads, bool) or not isinstance(threads, (int, np.integer)) or not 1 <= threads <= 64:
        raise ParameterError(f"Parameter threads={threads!r} is not an integer from 1 to 64!", param="threads")
    return int(threads)


class _Shares:
    """Splits ``count`` items of a kernel's work into contiguous shares that up to ``threads`` threads take
    one after another (the calling thread is one of them); one thread, or too little work, runs it all here.
    The numba kernels and scipy.fft's transforms both run without the GIL.
    """

    def __init__(self, threads: int) -> None:
        self.threads = threads
        self._pool: ThreadPoolExecutor | None = None

    def run(self, count: int, work_per_item: int, task: Callable[[int, int], None], *, align: int = 1) -> None:
        """``task(a, b)`` for shares ``[a, b)`` covering ``range(count)``; every share but the last starts and
        ends at a multiple of ``align`` (the fast fold sums frames in groups that must not be split)."""
        shares = min(_SHARES_PER_THREAD * self.threads, count // align,
                     max(1, count * work_per_item // _MIN_SHARED_WORK))
        if self.threads == 1 or shares <= 1:
            if count:
                task(0, count)
            return
        if self._pool is None:
            self._pool = ThreadPoolExecutor(max_workers=self.threads - 1, thread_name_prefix="bank")
        edges = [count // align * i // shares * align for i in range(shares)] + [count]
        queue = iter(range(shares))
        lock = threading.Lock()

        def take_shares() -> None:
            while True:
                with lock:
                    i = next(queue, None)
                if i is None:
                    return
                task(edges[i], edges[i + 1])
        helpers = [self._pool.submit(take_shares) for _ in range(self.threads - 1)]
        take_shares()
        for helper in helpers:
            helper.result()


#: The least number of points (rows x M) of an inverse transform shared between scipy.fft's own threads:
#: measured on 2 cores at M = 1024, 64 rows 1.0-1.25x (noise), 128 rows 1.27x, 1024 rows 1.76-1.84x.
_MIN_SHARED_TRANSFORM = 1 << 17


def _fft_rows(rows: np.ndarray) -> None:
    """Each row of ``rows`` replaced by its FFT, in place, by the calling thread."""
    import scipy.fft  # here rather than at the top: checking a flow need not load it
    if not len(rows):
        return
    result = scipy.fft.fft(rows, axis=1, overwrite_x=True, workers=1)
    if not np.may_share_memory(result, rows):
        rows[...] = result


def _inverse_fft_copy(frames: np.ndarray, *, threads: int = 1) -> np.ndarray:
    """A new C-ordered array: each row's inverse FFT without the 1/M, by up to ``threads`` of scipy.fft's
    own threads (each row is transformed the same way whichever thread takes it). scipy.fft copies each
    row as it transforms it, where a copy first and a transform in place took one more pass over the
    frames."""
    import scipy.fft
    workers = threads if frames.size >= _MIN_SHARED_TRANSFORM else 1
    result = scipy.fft.ifft(frames, axis=1, norm="forward", workers=workers)
    return np.ascontiguousarray(result)


def channel_offsets(channels: int) -> np.ndarray:
    """Channel centre offsets in cycles per input sample, FFT order (see module doc)."""
    return np.fft.fftfreq(channels)


def signed_channel(k: int, channels: int) -> int:
    """Channel ``k`` (FFT order) as a signed number, its centre's offset in channel spacings: k for
    k < M/2, k - M above (channel M-1 is -1, the next one below the centre).

    >>> [signed_channel(k, 8) for k in range(8)]
    [0, 1, 2, 3, -4, -3, -2, -1]
    """
    return (k + channels // 2) % channels - channels // 2


class AnalysisBank:
    """Streaming polyphase analysis bank (channelizer); conventions in the module doc.

    Parameters
    ----------
    channels : int
        Number of channels M (>= 2).
    decimation : int
        Decimation D, dividing M; ``M // D`` is the oversampling factor.
    taps : array_like
        Real prototype low-pass taps h, any length; their sum is the passband gain.
    kernel : {"fast", "reference"}, keyword-only
        The numba kernel (complex64 arithmetic) or the plain numpy one (float64).
    threads : int, keyword-only
        Threads that share each chunk's frames and FFTs (1 to 64; output identical to one thread).

    Notes
    -----
    ``process(x)`` takes a 1-D chunk of any length and returns the frames it
    completes as a ``(frames, M)`` complex64 array, channels in FFT order;
    after N input samples in all, ``ceil(N / D)`` frames have been returned.

    Examples
    --------
    A tone at +1/8 cycle per sample lands in channel 1 of 8, at full level:

    >>> import numpy as np
    >>> bank = AnalysisBank(8, 4, np.full(8, 1 / 8))
    >>> x = np.exp(2j * np.pi * np.arange(64) / 8).astype(np.complex64)
    >>> frames = bank.process(x[:30])
    >>> frames = np.concatenate([frames, bank.process(x[30:])])
    >>> frames.shape, int(np.argmax(np.abs(frames[-1]))), round(float(abs(frames[-1, 1])), 6)
    ((16, 8), 1, 1.0)
    """

    def __init__(self, channels: int, decimation: int, taps: np.ndarray, *, kernel: str = "fast",
                 threads: int = 1) -> None:
        self._channels, self._decimation = _check_geometry(channels, decimation, "decimation")
        self._taps = _check_taps(taps)
        self._kernel_name = _check_kernel(kernel)
        self._shares = _Shares(_check_threads(threads))
        self._kernel = _load_kernel(kernel)
        self._work_dtype = _KERNEL_DTYPES[kernel]
        self._prepared = self._kernel.prepare_fold_taps(self._taps, self._channels)
        self.reset()

    channels = property(lambda self: self._channels, doc="Number of channels M.")
    decimation = property(lambda self: self._decimation, doc="Decimation D (input samples per frame).")
    taps = property(lambda self: self._taps, doc="Prototype taps h (read-only float64 array).")
    kernel = property(lambda self: self._kernel_name, doc="'fast' (numba) or 'reference' (numpy).")
    threads = property(lambda self: self._shares.threads, doc="Threads sharing each chunk's work.")
    output_rate_ratio = property(lambda self: 1.0 / self._decimation,
                                 doc="Channel sample rate divided by input sample rate (1/D).")
    oversampling = property(lambda self: self._channels // self._decimation, doc="M // D.")
    channel_offsets = property(lambda self: channel_offsets(self._channels),
                               doc="Channel centres in cycles per input sample, FFT order.")
    samples_consumed = property(lambda self: self._consumed, doc="Input samples taken so far.")
    frames_produced = property(lambda self: self._frames, doc="Frames returned so far.")

    def __repr__(self) -> str:
        return (f"AnalysisBank(channels={self._channels}, decimation={self._decimation}, "
                f"taps=<{len(self._taps)} taps>, kernel={self._kernel_name!r}, threads={self.threads})")

    def reset(self) -> None:
        """Forget all input: the next sample given is absolute sample 0 again."""
        # the last L - 1 input samples (the history) at the front, and room after them for as many more:
        # frames whose window starts before a chunk's first sample read the history and the chunk's head
        # joined here, and the history is kept here, with no array made for either per chunk
        self._joined = np.zeros(2 * (len(self._taps) - 1), dtype=np.complex64)
        self._consumed = 0
        self._frames = 0

    def frames_for(self, samples: int) -> int:
        """How many frames the next ``process`` of ``samples`` input samples returns."""
        return -(-(self._consumed + samples) // self._decimation) - self._frames

    def process(self, x: np.ndarray, *, out: np.ndarray | None = None) -> np.ndarray:
        """Take the next chunk of input; return the frames it completes, shape ``(F, M)``.

        ``out``, keyword-only: where to write them, a C-contiguous complex64 array of shape
        ``(frames_for(len(x)), M)`` (such as room in a shared-memory ring, so that they need no copy
        after); it is returned.
        """
        x = np.asarray(x)
        if x.ndim != 1:
            raise ParameterError(f"process() takes a 1-D chunk of samples, got shape {x.shape}!", param="x")
        M, D, L = self._channels, self._decimation, len(self._taps)
        given = out
        if given is not None:
            shape = (self.frames_for(len(x)), M)
            if not (isinstance(given, np.ndarray) and given.dtype == np.complex64 and given.shape == shape
                    and given.flags.c_contiguous and given.flags.writeable):
                raise ParameterError(f"Parameter out must be a writeable C-contiguous complex64 array of shape "
                                     f"{shape}, got {getattr(given, 'dtype', type(given).__name__)} "
                                     f"{getattr(given, 'shape', '')}!", param="out")
        x = np.ascontiguousarray(x, dtype=np.complex64)
        before = self._consumed                      # absolute index of x[0]
        self._consumed += len(x)
        total_frames = -(-self._consumed // D)
        frame_numbers = np.arange(self._frames, total_frames, dtype=np.int64)
        self._frames = total_frames
        if given is not None and self._work_dtype == np.complex64:
            out = given                              # the frames are folded and transformed where they go
        else:
            out = np.empty((len(frame_numbers), M), dtype=self._work_dtype)
        # Absolute index of each frame's first window sample; a frame whose
        # window starts before x[0] reads from (history + head of x), the rest
        # read straight from x without copying the chunk.
        window_start = frame_numbers * D - (L - 1)
        boundary = int(np.searchsorted(window_start, before))
        if boundary:
            head = min(len(x), int(window_start[boundary - 1]) + L - before)
            joined = self._joined[:L - 1 + head]
            joined[L - 1:] = x[:head]
            self._fold(joined, window_start[:boundary] - (before - (L - 1)), window_start[:boundary], out[:boundary])
        untransformed = out                          # the frames left for one FFT call at the end
        if boundary < len(frame_numbers):
            starts, absolute, rest = window_start[boundary:] - before, window_start[boundary:], out[boundary:]
            if self.threads == 1:
                self._fold(x, starts, absolute, rest)
            else:
                # each thread folds and transforms its own shares (scipy.fft releases the GIL while it
                # transforms): one thread's transform overlaps another's fold. Measured in two interleaved
                # runs at M = 1024: 1.7x one thread, where a shared fold and then one scipy.fft call over
                # all the frames with its own threads gave 1.2x
                def fold_and_transform(a: int, b: int) -> None:
                    self._fold(x, starts[a:b], absolute[a:b], rest[a:b])
                    _fft_rows(rest[a:b])
                self._shares.run(len(rest), L, fold_and_transform, align=4 * (M // D))
                untransformed = out[:boundary]
        _fft_rows(untransformed)                     # one call, not two: a scipy.fft call costs about 10 us
        if L > 1:
            history, keep = self._joined[:L - 1], min(len(x), L - 1)
            if keep < L - 1:
                history[:L - 1 - keep] = history[keep:]     # numpy copies overlapping memory correctly
            history[L - 1 - keep:] = x[len(x) - keep:]
        if given is not None and out is not given:     # the reference kernel's float64 frames, rounded
            given[...] = out
            return given
        return out.astype(np.complex64, copy=False)

    def skip(self, count: int) -> np.ndarray:
        """Advance absolute time by ``count`` missing input samples, taken as zeros.

        Returns the frames that still see real samples in their window (as
        ``process`` would); frames whose whole window lies in the gap are all
        zero and are not returned: ``frames_produced`` jumps past them, so the
        next frame returned is numbered correctly.
        """
        L = len(self._taps)
        if count < 0:
            raise ParameterError(f"Parameter {count=} is negative!", param="count")
        head = min(count, L - 1 + self._decimation)
        frames = self.process(np.zeros(head, dtype=np.complex64))
        rest = count - head
        if rest:
            self._joined[:] = 0
            self._consumed += rest
            self._frames = -(-self._consumed // self._decimation)
        return frames

    def _fold(self, buffer: np.ndarray, starts: np.ndarray, absolute_starts: np.ndarray, out: np.ndarray) -> None:
        self._kernel.fold_frames(buffer, self._prepared, self._channels, starts, absolute_starts % self._channels, out)


class SynthesisBank:
    """Streaming polyphase synthesis bank; conventions in the module doc.

    Parameters
    ----------
    channels : int
        Number of channels M (>= 2).
    interpolation : int
        Interpolation D, dividing M (the analysis bank's decimation).
    taps : array_like
        Real synthesis taps g; any scale is folded into them.
    kernel : {"fast", "reference"}, keyword-only
        The numba kernel (complex64 arithmetic) or the plain numpy one (float64).
    threads : int, keyword-only
        Threads that share each chunk's output samples and FFTs (1 to 64; output identical to one thread).

    Notes
    -----
    ``process(Y)`` takes a ``(frames, M)`` array (channels in FFT order) and
    returns ``frames * D`` complex64 samples.

    Examples
    --------
    A matched pair from :func:`~bandloom.blocks.dsp.design.design_bank` gives
    the input back, delayed by the design's ``delay`` samples:

    >>> import numpy as np
    >>> from bandloom.blocks.dsp import design_bank
    >>> design = design_bank(16, oversample=2)
    >>> x = np.random.default_rng(1).standard_normal(4096).astype(np.complex64)
    >>> y = design.synthesis_bank().process(design.analysis_bank().process(x))
    >>> d = design.delay
    >>> error = np.sum(np.abs(y[d:] - x[:len(y) - d]) ** 2) / np.sum(np.abs(x[:len(y) - d]) ** 2)
    >>> bool(10 * np.log10(error) < -110)
    True
    """

    def __init__(self, channels: int, interpolation: int, taps: np.ndarray, *, kernel: str = "fast",
                 threads: int = 1) -> None:
        self._channels, self._interpolation = _check_geometry(channels, interpolation, "interpolation")
        self._taps = _check_taps(taps)
        self._kernel_name = _check_kernel(kernel)
        self._shares = _Shares(_check_threads(threads))
        self._kernel = _load_kernel(kernel)
        self._work_dtype = _KERNEL_DTYPES[kernel]
        self._prepared = self._kernel.prepare_spread_taps(self._taps, self._channels)
        self.reset()

    channels = property(lambda self: self._channels, doc="Number of channels M.")
    interpolation = property(lambda self: self._interpolation, doc="Interpolation D (output samples per frame).")
    taps = property(lambda self: self._taps, doc="Synthesis taps g (read-only float64 array).")
    kernel = property(lambda self: self._kernel_name, doc="'fast' (numba) or 'reference' (numpy).")
    threads = property(lambda self: self._shares.threads, doc="Threads sharing each chunk's work.")
    frames_consumed = property(lambda self: self._frames, doc="Frames taken so far.")

    def __repr__(self) -> str:
        return (f"SynthesisBank(channels={self._channels}, interpolation={self._interpolation}, "
                f"taps=<{len(self._taps)} taps>, kernel={self._kernel_name!r}, threads={self.threads})")

    def reset(self) -> None:
        """Forget all frames: the next frame given is frame 0 again."""
        self._pending: np.ndarray = np.zeros(len(self._taps), dtype=self._work_dtype)
        self._frames = 0

    def process(self, frames: np.ndarray) -> np.ndarray:
        """Take the next frames, shape ``(F, M)``; return the ``F * D`` samples they complete."""
        frames = np.asarray(frames)
        M, D, L = self._channels, self._interpolation, len(self._taps)
        if frames.ndim != 2 or frames.shape[1] != M:
            raise ParameterError(f"process() takes frames of shape (F, {M}), got shape {frames.shape}!", param="frames")
        count = len(frames)
        if count == 0:
            return np.zeros(0, dtype=np.complex64)
        periodic = _inverse_fft_copy(np.asarray(frames, dtype=self._work_dtype), threads=self.threads)
        out: np.ndarray = np.zeros(count * D + L, dtype=self._work_dtype)
        out[:L] = self._pending
        phase = (self._frames * D) % M
        # each thread its own range of output samples, summed over the frames in order as in one call
        self._shares.run(len(out), max(1, L // D),
                         lambda a, b: self._kernel.spread_frames(periodic, self._prepared, D, M, phase, out, a, b))
        self._frames += count
        self._pending = out[count * D:]             # a view: what the caller gets ends before it
        return out[:count * D].astype(np.complex64, copy=False)

    def skip(self, count: int) -> np.ndarray:
        """Advance by ``count`` missing frames, taken as zeros.

        Returns the output samples that still carry earlier frames' tails;
        ``frames_consumed * D`` tells the absolute index after the call.
        """
        if count < 0:
            raise ParameterError(f"Parameter {count=} is negative!", param="count")
        M, D, L = self._channels, self._interpolation, len(self._taps)
        head = min(count, -(-L // D))
        out = self.process(np.zeros((head, M), dtype=np.complex64))
        self._frames += count - head
        if count > head:
            self._pending[:] = 0
        return out
