"""Streaming rational resampler equal to ``scipy.signal.resample_poly``.

``Resampler(up, down)`` designs the same filter as ``resample_poly`` with its
default window (``('kaiser', 5.0)``, half length ``10 * max(up, down)``
after reducing ``up/down``), applies it as a polyphase FIR to a stream, and
aligns the output the same way: output sample 0 sits at input sample 0 (a
centred filter). Feeding a signal in any chunking and then calling
``finish()`` returns exactly ``resample_poly(signal, up, down)``: the first
outputs wait for half a filter length of input, and ``finish`` supplies the
zeros ``resample_poly`` pads the end with.

Missing input (a gap in the stream) is taken as zeros: ``skip(n)`` returns
the outputs near the gap's start that still see real input, then moves past
the outputs that would see only zeros without computing them (they are
exactly zero), so the stream stays equal to ``resample_poly`` of the
zero-filled input while the gap stays a gap at the output rate.

The same module is the reference implementation: there is no separate fast
path.
"""

from __future__ import annotations

from math import gcd

import numpy as np
from numpy.lib.stride_tricks import sliding_window_view

from .errors import ParameterError

__all__ = ["Resampler", "resample_poly_taps"]


def resample_poly_taps(up: int, down: int, window: object = ("kaiser", 5.0)) -> tuple[np.ndarray, int, int, int]:
    """The filter resample_poly uses, with its front padding; returns (taps, drop, up, down)."""
    import scipy.signal

    g = gcd(up, down)
    up, down = up // g, down // g
    max_rate = max(up, down)
    half_len = 10 * max_rate
    taps = scipy.signal.firwin(2 * half_len + 1, 1.0 / max_rate, window=window) * up
    pre_pad = down - half_len % down
    drop = (half_len + pre_pad) // down
    return np.concatenate([np.zeros(pre_pad), taps]), drop, up, down


class Resampler:
    """Streaming ``up/down`` resampler, complex or real input (see module doc)."""

    def __init__(self, up: int, down: int) -> None:
        for name, value in (("up", up), ("down", down)):
            if value < 1:
                raise ParameterError(f"Parameter {name}={value} is not a whole number >= 1!", param=name)
        taps, self.drop, self.up, self.down = resample_poly_taps(int(up), int(down))
        self.branch_len = -(-len(taps) // self.up)
        padded = np.zeros(self.branch_len * self.up)
        padded[:len(taps)] = taps
        # phase p, tap k: taps[p + k*up]; reversed in k so a window x[m-K+1 .. m] dots it directly
        self.branches = padded.reshape(self.branch_len, self.up).T[:, ::-1].copy()
        self.taps_length = len(taps)
        self.reset()

    def reset(self) -> None:
        self.history: np.ndarray | None = None
        self.consumed = 0       # input samples taken
        self.produced = 0       # outputs of the full upfirdn computed (before dropping)
        self.emitted = 0        # outputs returned

    def _outputs(self, buffer: np.ndarray, first_index: int, limit: int) -> np.ndarray:
        """Full-upfirdn outputs j from self.produced while their last needed input < limit."""
        K = self.branch_len
        # output j needs inputs up to floor(j*down/up); emit while that is < limit
        last = (limit * self.up - 1) // self.down if limit > 0 else -1
        j = np.arange(self.produced, last + 1, dtype=np.int64)
        if len(j) == 0:
            return np.zeros(0, dtype=buffer.dtype)
        newest = (j * self.down) // self.up
        phase = (j * self.down) % self.up
        windows = sliding_window_view(buffer, K)[newest - (K - 1) - first_index]
        out = np.einsum("jk,jk->j", windows, self.branches[phase])
        self.produced = int(last) + 1
        return out

    def _take(self, full: np.ndarray) -> np.ndarray:
        skip = max(0, min(len(full), self.drop - (self.produced - len(full))))
        return full[skip:]

    def process(self, x: np.ndarray) -> np.ndarray:
        x = np.asarray(x)
        dtype = np.complex128 if np.iscomplexobj(x) else np.float64
        K = self.branch_len
        if self.history is None:
            self.history = np.zeros(K - 1, dtype=dtype)
        buffer = np.concatenate([self.history.astype(dtype), x.astype(dtype)])
        first_index = self.consumed - (K - 1)
        self.consumed += len(x)
        out = self._take(self._outputs(buffer, first_index, self.consumed))
        self.history = buffer[len(buffer) - (K - 1):] if K > 1 else buffer[:0]
        self.emitted += len(out)
        return out

    def skip(self, n: int) -> tuple[np.ndarray, int]:
        """Take ``n`` missing input samples as zeros (see module doc).

        Returns ``(edge, skipped)``: the outputs computed across the gap's
        start, then the number of outputs after them that see only the gap
        (all exactly zero, not returned).
        """
        K = self.branch_len
        dtype = self.history.dtype if self.history is not None else np.float64
        head = min(int(n), K)                 # after K zeros the history holds only zeros
        edge = self.process(np.zeros(head, dtype))
        rest = int(n) - head
        if not rest:
            return edge, 0
        before = self.produced
        self.consumed += rest
        self.produced = (self.consumed * self.up - 1) // self.down + 1
        skipped = self.produced - before - max(0, min(self.produced - before, self.drop - before))
        self.emitted += skipped
        return edge, skipped

    def finish(self) -> np.ndarray:
        """The last outputs, computed with the zero padding resample_poly uses."""
        total = self.consumed * self.up
        wanted = total // self.down + bool(total % self.down)
        missing = wanted - self.emitted
        if missing <= 0:
            return np.zeros(0, dtype=self.history.dtype if self.history is not None else np.float64)
        # Pad with zeros up to the last input that output (wanted + drop - 1) needs.
        last_output = wanted + self.drop - 1
        pad = max(1, (last_output * self.down) // self.up + 1 - self.consumed)
        produced = self.process(np.zeros(pad, dtype=self.history.dtype if self.history is not None else np.float64))
        self.consumed -= pad                   # padding is not input
        tail = produced[:missing]
        self.emitted = wanted
        return tail
