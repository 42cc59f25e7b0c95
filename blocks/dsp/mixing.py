"""Frequency shifting in absolute time."""

import numpy as np

__all__ = ["shift_frequency"]


def shift_frequency(data: np.ndarray, first_index: int, cycles_per_sample: float) -> np.ndarray:
    """``data * exp(2j pi f m)`` with ``m`` the absolute index of each sample and ``f`` in cycles per sample.

    The phase is reduced modulo one cycle from the absolute index, so it is
    exact across chunks and never drifts however long the stream runs.
    """
    m = first_index + np.arange(len(data))
    return (data * np.exp(2j * np.pi * np.mod(m * cycles_per_sample, 1.0))).astype(np.complex64)
