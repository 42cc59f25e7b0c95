"""Zak-domain dual/tight windows against scipy's ShortTimeFFT, and the round-trip transfer against simulation."""

import numpy as np
import pytest
import scipy.signal
from bandloom.blocks.dsp import AnalysisBank, SynthesisBank, dual_window, frame_bounds, round_trip_transfer, tight_window
from conftest import complex_noise


@pytest.mark.parametrize("window,length,channels,hop", [
    ("hann", 48, 64, 16), ("hamming", 64, 64, 16), (("kaiser", 8.0), 30, 32, 8), ("blackman", 100, 128, 32),
])
def test_dual_window_matches_scipy_short_time_fft(window, length, channels, hop):
    """For windows no longer than M the canonical dual equals ShortTimeFFT.dual_win / M (reference library)."""
    win = scipy.signal.get_window(window, length, fftbins=False)
    stft = scipy.signal.ShortTimeFFT(win, hop=hop, fs=1, mfft=channels, fft_mode="twosided")
    ours = dual_window(win, channels, hop)
    # scipy's PR condition has no factor M; references.md's (Janssen) has M.
    assert np.allclose(stft.dual_win, channels * ours, rtol=1e-10, atol=1e-12)


@pytest.mark.parametrize("window,length,channels,hop", [
    ("hann", 48, 64, 16), (("kaiser", 8.0), 30, 32, 8), ("blackman", 100, 128, 32),
])
def test_tight_window_matches_scipy_win_equals_dual(window, length, channels, hop):
    """The canonical tight window equals ShortTimeFFT.from_win_equals_dual's window up to scale (reference library)."""
    win = scipy.signal.get_window(window, length, fftbins=False)
    stft = scipy.signal.ShortTimeFFT.from_win_equals_dual(win, hop=hop, fs=1, mfft=channels,
                                                          fft_mode="twosided")
    ours = tight_window(win, channels, hop)
    assert np.allclose(stft.win / stft.win.sum(), ours / ours.sum(), atol=1e-12)
    low, high = frame_bounds(ours, channels, hop)
    assert high / low == pytest.approx(1.0, abs=1e-9)


def test_frame_condition_of_critically_sampled_long_kaiser_is_large():
    """Critically sampled long Kaiser prototypes are badly conditioned, B/A in the thousands or worse (references.md)."""
    M = 32
    taps = scipy.signal.firwin(8 * M + 1, 1.0 / M, window=("kaiser", 8.0))
    low, high = frame_bounds(taps, M, M)
    assert low == 0 or high / low > 1000


def test_transfer_predicts_simulated_round_trip(rng):
    """round_trip_transfer's weights reproduce a simulated analysis->synthesis run sample for sample."""
    M, D = 8, 4
    h, g = rng.standard_normal(21), rng.standard_normal(33)
    trip = round_trip_transfer(h, g, M, D, 16)
    x = complex_noise(rng, 3000, np.complex128)
    y = SynthesisBank(M, D, g, kernel="reference").process(AnalysisBank(M, D, h, kernel="reference").process(x))
    predicted = np.zeros(len(y), dtype=complex)
    for lag in range(trip.transfer.shape[1]):
        m = np.arange(lag * M, len(y))
        predicted[m] += trip.transfer[m % D, lag] * x[m - lag * M]
    assert np.max(np.abs(predicted[100:] - y[100:])) <= 1e-5 * np.max(np.abs(y))
