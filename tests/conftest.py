"""Shared helpers: scipy brute-force oracles for the bank conventions, and a busy machine."""

import os
import subprocess
import sys
import tempfile

import numpy as np
import pytest
import scipy.signal

# The suite keeps its bank designs in a design cache of its own (blocks/_bank_params.py), made new for each
# session, so that nothing from an earlier run or from the user's own cache is used; the processes the tests
# start inherit it.
os.environ["BANDLOOM_CACHE_DIR"] = tempfile.mkdtemp(prefix="bandloom-test-designs-")


def analysis_oracle(taps, x, channels, decimation):
    """Brute force from design.md section 3: per channel mix down, upfirdn(h, ., 1, D).

    Reference library: scipy.signal.upfirdn. Returns ceil(N / D) frames.
    """
    x = np.asarray(x, dtype=np.complex128)
    m = np.arange(len(x))
    columns = [scipy.signal.upfirdn(taps, x * np.exp(-2j * np.pi * k * m / channels), 1, decimation)
               for k in range(channels)]
    return np.stack(columns, axis=1)[:-(-len(x) // decimation)]


def synthesis_oracle(taps, frames, channels, interpolation):
    """Brute force: per channel upfirdn(g, Y[:, k], D, 1), mix up, sum; F*D samples."""
    frames = np.asarray(frames, dtype=np.complex128)
    n = len(frames) * interpolation
    m = np.arange(n)
    out = np.zeros(n, dtype=np.complex128)
    for k in range(channels):
        up = scipy.signal.upfirdn(taps, frames[:, k], interpolation, 1)[:n]
        out[:len(up)] += up * np.exp(2j * np.pi * k * m[:len(up)] / channels)
    return out


def complex_noise(rng, n, dtype=np.complex64):
    return (rng.standard_normal(n) + 1j * rng.standard_normal(n)).astype(dtype)


def relative_error(actual, expected):
    return float(np.max(np.abs(actual - expected)) / max(np.max(np.abs(expected)), 1e-30))


@pytest.fixture
def rng():
    return np.random.default_rng(20261201)


@pytest.fixture
def busy_machine():
    """Two CPU-bound processes beside the test, as a loaded machine has (ended afterwards)."""
    burners = [subprocess.Popen([sys.executable, "-c", "while True: pass"]) for _ in range(2)]
    yield
    for b in burners:
        b.kill()
        b.wait()
