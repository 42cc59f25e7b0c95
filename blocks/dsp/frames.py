"""Frame theory of oversampled DFT filter banks: Zak transform, frame bounds,
canonical dual and tight windows, and the exact round-trip transfer.

Window convention
-----------------
The functions take a bank's prototype taps ``h[0 .. L-1]`` exactly as
:class:`~bandloom.blocks.dsp.banks.AnalysisBank` uses them. In the Gabor
notation of the references (analysis ``c[m,k] = sum_n x[n] g*[n - mD]
exp(-2j pi k n / M)``) the analysis window is ``g[t] = conj(h[-t])``: the taps
time-reversed. Frame bounds, duality and tightness do not change under a
time shift by a whole number of samples, nor under time reversal (the
lattice ``{mD}`` is symmetric), so every computation here can work on ``h``
as it is stored; the results carry over to ``g``.

Discrete Zak transform with ``p = M // D`` (integer oversampling), after
Bölcskei & Hlawatsch, IEEE Trans. Signal Process. 45(4), 1997::

    Z(n, theta) = sum_r h[n + r*M] * exp(-2j*pi*r*theta),   n = 0 .. M-1
    sigma(n, theta) = M * sum_{q=0}^{p-1} |Z((n - q*D) mod M, theta)|**2

``sigma`` is the frame operator in the Zak domain: frame bounds ``A = min
sigma``, ``B = max sigma``; canonical dual ``Z / sigma``; canonical tight
window ``Z / sqrt(sigma)``. ``theta`` is sampled on a uniform grid of
``grid`` points in ``[0, 1)``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .errors import ParameterError

__all__ = [
    "RoundTrip", "dual_window", "frame_bounds", "frame_function", "round_trip_transfer", "tight_window",
    "zak_transform"
]


def _default_grid(branches: int) -> int:
    return max(64, 8 * (1 << int(np.ceil(np.log2(max(branches, 1))))))


def _branches(window: np.ndarray, channels: int) -> np.ndarray:
    window = np.asarray(window)
    branches = -(-len(window) // channels)
    padded = np.zeros(branches * channels, dtype=window.dtype)
    padded[:len(window)] = window
    # (branches, M): row r holds window[r*M : (r+1)*M]
    return padded.reshape(branches, channels)


def zak_transform(window: np.ndarray, channels: int, *, grid: int | None = None) -> np.ndarray:
    """Zak transform ``Z[n, j] = Z(n, j / grid)``, shape ``(channels, grid)``."""
    rows = _branches(window, channels)
    grid = grid or _default_grid(len(rows))
    if grid < len(rows):
        raise ParameterError(f"Parameter {grid=} is smaller than the {len(rows)} taps per branch!", param="grid")
    return np.fft.fft(rows, n=grid, axis=0).T


def frame_function(window: np.ndarray, channels: int, decimation: int, *, grid: int | None = None) -> np.ndarray:
    """``sigma(n, theta)`` on the grid, shape ``(channels, grid)`` (see module doc)."""
    z2 = np.abs(zak_transform(window, channels, grid=grid)) ** 2
    p = channels // decimation
    return channels * sum(np.roll(z2, q * decimation, axis=0) for q in range(p))


def frame_bounds(window: np.ndarray, channels: int, decimation: int, *, grid: int | None = None) -> tuple[float, float]:
    """Frame bounds ``(A, B)``: ``A = min sigma``, ``B = max sigma``.

    ``B / A`` is the condition number: 1 for a tight frame, large when the
    bank is hard to invert.
    """
    sigma = frame_function(window, channels, decimation, grid=grid)
    return float(sigma.min()), float(sigma.max())


def _apply_zak_gain(window: np.ndarray, channels: int, decimation: int, power: float, grid: int | None,
                    length: int | None) -> np.ndarray:
    window = np.asarray(window, dtype=np.float64)
    rows = _branches(window, channels)
    grid = grid or _default_grid(len(rows))
    z = zak_transform(window, channels, grid=grid)
    sigma = frame_function(window, channels, decimation, grid=grid)
    if sigma.min() <= 0:
        raise ValueError("The window does not give a frame at this decimation (sigma reaches 0); "
                         "no dual or tight window exists!")
    branches = np.fft.ifft((z / sigma ** power).T, axis=0)[:len(rows)]
    out = branches.reshape(-1).real
    return out[:length or len(window)].copy()


def tight_window(window: np.ndarray, channels: int, decimation: int, *, grid: int | None = None,
                 length: int | None = None) -> np.ndarray:
    """Canonical tight window ``S^(-1/2) h``, truncated to ``length`` taps (default ``len(h)``).

    The exact tight window is infinitely long in general; it is computed on a
    ``grid``-point theta grid and truncated. What truncation costs shows in
    :func:`round_trip_transfer`.
    """
    return _apply_zak_gain(window, channels, decimation, 0.5, grid, length)


def dual_window(window: np.ndarray, channels: int, decimation: int, *, grid: int | None = None,
                length: int | None = None) -> np.ndarray:
    """Canonical dual window ``S^(-1) h``, truncated to ``length`` taps (default ``len(h)``)."""
    return _apply_zak_gain(window, channels, decimation, 1.0, grid, length)


@dataclass(frozen=True)
class RoundTrip:
    """Exact steady-state behaviour of analysis followed by synthesis.

    ``transfer[r, l]`` is the weight with which input sample ``m - l*M``
    reaches output sample ``m`` for every ``m`` with ``m % D == r``. A perfect
    bank has ``transfer[r, l] = 1`` for ``l = delay // M`` and 0 elsewhere.
    ``relative_error`` is the RMS error of the output relative to the input
    for white input (linear; ``error_db`` is ``20 log10`` of it).
    """

    transfer: np.ndarray
    delay: int
    gain: complex
    relative_error: float

    @property
    def error_db(self) -> float:
        return float(20 * np.log10(max(self.relative_error, 1e-15)))


def round_trip_transfer(analysis_taps: np.ndarray, synthesis_taps: np.ndarray, channels: int, decimation: int,
                        delay: int) -> RoundTrip:
    """The round trip's transfer (see :class:`RoundTrip`) for a given delay (multiple of M).

    Derivation, with the bank conventions of :mod:`.banks`: substituting the
    analysis into the synthesis and summing the channel exponentials gives
    ``x_hat[m] = sum_l x[m - l*M] * M * sum_n g[m - n*D] * h[n*D - m + l*M]``.
    """
    h = np.asarray(analysis_taps, dtype=np.float64)
    g = np.asarray(synthesis_taps, dtype=np.float64)
    M, D = channels, decimation
    if delay % M:
        raise ParameterError(f"Parameter {delay=} is not a multiple of channels={M}!", param="delay")
    p = M // D
    # Polyphase: t = r + a*D indexes g, and l*M - t = (l*p - a)*D - r indexes h.
    a_count = -(-len(g) // D)
    g_poly = np.zeros((D, a_count))
    gp = np.zeros(a_count * D)
    gp[:len(g)] = g
    g_poly[:, :] = gp.reshape(a_count, D).T               # g_poly[r, a] = g[r + a*D]
    b_count = -(-(len(h) + D) // D) + 1
    hp = np.zeros(b_count * D + D)
    hp[:len(h)] = h
    # h_poly[r, b] = h[b*D - r] (zero for negative index)
    b = np.arange(b_count)
    r = np.arange(D)
    idx = b[None, :] * D - r[:, None]
    h_poly = np.where(idx >= 0, hp[np.clip(idx, 0, None)], 0.0)
    size = a_count + b_count - 1
    n_fft = 1 << int(np.ceil(np.log2(size)))
    conv = np.fft.irfft(np.fft.rfft(g_poly, n_fft, axis=1) * np.fft.rfft(h_poly, n_fft, axis=1),
                        n_fft, axis=1)[:, :size]
    transfer = M * conv[:, ::p]                            # index l*p for l = 0, 1, ...
    lag = delay // M
    if lag >= transfer.shape[1]:
        raise ParameterError(f"Parameter {delay=} is beyond the taps' reach!", param="delay")
    gain = complex(transfer[:, lag].mean())
    ideal = np.zeros_like(transfer)
    ideal[:, lag] = 1.0
    error = float(np.sqrt(np.mean(np.sum((transfer - ideal) ** 2, axis=1))))
    return RoundTrip(transfer=transfer, delay=int(delay), gain=gain, relative_error=error)
