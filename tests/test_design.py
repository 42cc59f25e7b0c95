"""design_bank: the default oversampled designs meet their figures and really reconstruct."""

import os
import subprocess
import sys

import numpy as np
import pytest
from bandloom.blocks.dsp import design_bank, response_figures
from conftest import complex_noise

POWERS_OF_TWO = [8, 16, 32, 64, 128, 256, 512, 1024, 2048, 4096]


def simulated_round_trip_db(design, rng, frames=40):
    """Relative RMS error, dB, of complex64 white noise through the fast banks (steady state)."""
    x = complex_noise(rng, design.channels * frames + design.delay)
    y = design.synthesis_bank().process(design.analysis_bank().process(x))
    d = design.delay
    error = y[2 * d:] - x[d:len(y) - d]
    return 10 * np.log10(np.mean(np.abs(error) ** 2) / np.mean(np.abs(x) ** 2))


@pytest.mark.parametrize("channels", POWERS_OF_TWO)
def test_default_twice_oversampled_design_meets_targets(channels, rng):
    """M/D = 2 default: rejection >= 100 dB, flat ripple <= 0.05 dB, complex64 round trip <= -110 dB."""
    design = design_bank(channels)
    assert design.decimation == channels // 2
    fig = design.response
    assert fig.adjacent_rejection_db >= 100.0
    assert fig.passband_ripple_db <= 0.05
    assert design.round_trip_error_db <= -115.0            # float64 prediction
    assert simulated_round_trip_db(design, rng) <= -110.0  # measured, complex64 fast path
    assert design.delay % channels == 0
    assert abs(np.sum(design.analysis_taps) - 1.0) < 1e-12  # unity passband gain


def test_default_design_channel_edge_is_half_power():
    """Power-complementary channels: -3.01 dB at the channel edge, so a tone between two channels loses 3 dB, not 3.9."""
    fig = design_bank(64).response
    assert fig.edge_3db == pytest.approx(0.5, abs=0.005)
    assert fig.scalloping_loss_db == pytest.approx(10 * np.log10(2), abs=0.02)


def test_delay_is_reported_correctly(rng):
    """Shifting the output by design.delay aligns it with the input; one sample more does not."""
    design = design_bank(16)
    x = complex_noise(rng, 16 * 60)
    y = design.synthesis_bank().process(design.analysis_bank().process(x))
    d = design.delay
    aligned = np.max(np.abs(y[2 * d:] - x[d:len(y) - d]))
    misaligned = np.max(np.abs(y[2 * d + 1:] - x[d:len(y) - d - 1]))
    assert aligned < 1e-4 < misaligned


@pytest.mark.parametrize("channels", [8, 64, 1024])
def test_critically_sampled_low_pass_reports_its_poor_round_trip(channels, rng):
    """D = M low-pass designs are for analysis: the reported round-trip error is honest (simulation within 1 dB) and poor."""
    design = design_bank(channels, oversample=1)
    assert design.shape == "low-pass"
    assert design.response.adjacent_rejection_db >= 80.0
    assert design.round_trip_error_db > -20.0
    assert simulated_round_trip_db(design, rng, frames=200) == pytest.approx(design.round_trip_error_db, abs=1.0)


def test_rectangle_reconstructs_exactly_but_leaks(rng):
    """The trivial window reconstructs exactly at D = M, at the price of -13 dB sidelobes."""
    design = design_bank(64, oversample=1, shape="rectangle")
    assert design.round_trip_error_db <= -250
    assert simulated_round_trip_db(design, rng) <= -130
    assert design.response.highest_sidelobe_db == pytest.approx(-13.26, abs=0.05)


def test_oversampled_by_four_also_reconstructs(rng):
    """M/D = 4 default design is tight and reconstructs as well as M/D = 2."""
    design = design_bank(64, oversample=4)
    assert design.round_trip_error_db <= -115
    assert simulated_round_trip_db(design, rng) <= -110
    assert design.response.adjacent_rejection_db >= 100


def test_design_figures_match_response_figures():
    """The design's figures are the response figures of its analysis taps."""
    design = design_bank(32, taps_per_branch=12, stopband_db=100)
    direct = response_figures(design.analysis_taps, 32, passband_edge=design.passband_edge)
    figures = design.figures()
    assert figures["adjacent_rejection_db"] == direct.adjacent_rejection_db
    assert figures["taps"] == 12 * 32 + 1
    assert figures["frame_condition"] == pytest.approx(1.0, abs=1e-3)


@pytest.mark.parametrize("kwargs,message", [
    (dict(channels=16, decimation=3), "decimation=3 does not divide channels=16"),
    (dict(channels=16, decimation=4, oversample=4), "not both"),
    (dict(channels=16, shape="sinc"), "shape='sinc'"),
    (dict(channels=16, rolloff=1.5), "rolloff=1.5 is outside"),
    (dict(channels=16, taps_per_branch=2.5), "taps_per_branch=2.5 is not a whole number"),
    (dict(channels=16, window="nonesuch"), "window='nonesuch'"),
    (dict(channels=16, oversample=1, tight=True), "tight=True needs"),
])
def test_bad_design_knobs_are_named(kwargs, message):
    """Bad knobs raise ValueError naming the knob and the rule."""
    with pytest.raises(ValueError, match=message):
        design_bank(**kwargs)


def test_a_design_handed_over_as_a_file_is_the_same_design(tmp_path, monkeypatch):
    """What the supervisor saves into a run's folder, a worker loads without designing again: the same taps,
    delay and knobs bit for bit (design_bank is made to fail in the 'worker' to prove it is not called)."""
    from bandloom.blocks import _bank_params
    knobs = {"shape": None, "taps_per_branch": 12, "rolloff": None, "stopband_db": None, "window": "kaiser",
             "tight_margin": None}
    monkeypatch.setattr(_bank_params, "cache_folder", lambda: None)     # this test is about the run's folder only
    made = _bank_params.make_design(32, 2, knobs)
    _bank_params.save_designs(tmp_path)
    monkeypatch.setattr(_bank_params, "_DESIGNS", {})
    monkeypatch.setattr(_bank_params, "design_bank", lambda *a, **k: (_ for _ in ()).throw(AssertionError("designed")))
    loaded = _bank_params.make_design(32, 2, knobs, folder=tmp_path)
    assert np.array_equal(loaded.analysis_taps, made.analysis_taps)
    assert np.array_equal(loaded.synthesis_taps, made.synthesis_taps)
    assert (loaded.delay, loaded.decimation, loaded.taps_per_branch, loaded.shape) == \
        (made.delay, made.decimation, made.taps_per_branch, made.shape)
    other = dict(knobs, taps_per_branch=10)                  # different knobs: not taken for the saved one
    with pytest.raises(AssertionError, match="designed"):
        _bank_params.make_design(32, 2, other, folder=tmp_path)


def _design_in_a_new_process(cache, channels, code="", env_extra=None):
    """make_design in a fresh interpreter with BANDLOOM_CACHE_DIR = ``cache``; returns what ``code`` prints."""
    script = ("import sys, numpy as np\n"
              "from bandloom.blocks._bank_params import make_design, cache_folder\n"
              f"d = make_design({channels}, 2, {{'window': 'kaiser'}})\n" + code)
    env = dict(os.environ, BANDLOOM_CACHE_DIR=str(cache), **(env_extra or {}))
    done = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, env=env, timeout=120)
    assert done.returncode == 0, done.stderr
    return done.stdout


def test_a_design_made_once_is_loaded_from_the_users_cache_without_scipy_signal(tmp_path):
    """The first process designs and keeps the design in the cache folder (0700, file 0600); a second one loads
    it without importing scipy.signal, and its taps are bit for bit those design_bank makes now."""
    cache = tmp_path / "designs"
    _design_in_a_new_process(cache, 48)
    (kept,) = cache.glob("design-*.npz")
    assert cache.stat().st_mode & 0o777 == 0o700 and kept.stat().st_mode & 0o077 == 0
    shown = _design_in_a_new_process(cache, 48, "print('scipy.signal' in sys.modules, d.delay)\n"
                                                 "print(d.analysis_taps.tobytes().hex())\n")
    imported, delay, taps = shown.split()
    fresh = design_bank(48, oversample=2)
    assert imported == "False"
    assert taps == fresh.analysis_taps.tobytes().hex() and int(delay) == fresh.delay


def test_a_damaged_cached_design_is_made_again(tmp_path):
    """A cached file that does not load (truncated) is designed afresh and replaced by a good one."""
    cache = tmp_path / "designs"
    _design_in_a_new_process(cache, 40)
    (kept,) = cache.glob("design-*.npz")
    kept.write_bytes(kept.read_bytes()[:100])
    shown = _design_in_a_new_process(cache, 40, "print('scipy.signal' in sys.modules, d.delay)\n")
    assert shown.split() == ["True", str(design_bank(40, oversample=2).delay)]
    assert kept.stat().st_size > 1000


def test_a_cache_folder_others_can_write_to_is_not_used(tmp_path):
    """A cache folder that other users can write to (0777) could hold designs planted by them: it is not read
    or written; 'off' turns the cache off."""
    cache = tmp_path / "shared"
    cache.mkdir()
    cache.chmod(0o777)
    assert _design_in_a_new_process(cache, 24, "print(cache_folder())\n").strip() == "None"
    assert list(cache.iterdir()) == []
    assert _design_in_a_new_process("off", 24, "print(cache_folder())\n").strip() == "None"
