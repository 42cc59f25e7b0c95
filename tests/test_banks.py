"""AnalysisBank and SynthesisBank against scipy's upfirdn brute force (design.md section 3)."""

import numpy as np
import pytest
from bandloom.blocks.dsp import AnalysisBank, SynthesisBank, channel_offsets
from bandloom.blocks.dsp.errors import ParameterError
from conftest import analysis_oracle, complex_noise, relative_error, synthesis_oracle
from hypothesis import given, settings
from hypothesis import strategies as st

# (M, D, L): powers of two and not, every kind of divisor, L shorter than M,
# not a multiple of M, and long.
GEOMETRIES = [
    (2, 1, 1), (2, 2, 5), (3, 1, 10), (3, 3, 2), (4, 2, 4), (8, 4, 30), (8, 8, 64),
    (12, 1, 7), (12, 2, 25), (12, 3, 100), (12, 4, 37), (12, 6, 12), (12, 12, 61),
    (16, 8, 129), (16, 16, 100), (64, 32, 500), (100, 50, 333), (100, 25, 1200), (100, 100, 99),
]


@pytest.mark.parametrize("kernel", ["reference", "fast"])
@pytest.mark.parametrize("channels,decimation,length", GEOMETRIES)
def test_analysis_equals_upfirdn_oracle(rng, kernel, channels, decimation, length):
    """Every channel equals mix-down + scipy.signal.upfirdn(h, ., 1, D), phase included."""
    taps = rng.standard_normal(length)
    x = complex_noise(rng, 7 * channels + 13)
    expected = analysis_oracle(taps, x, channels, decimation)
    bank = AnalysisBank(channels, decimation, taps, kernel=kernel)
    got = bank.process(x)
    assert got.dtype == np.complex64
    assert got.shape == expected.shape == (-(-len(x) // decimation), channels)
    assert relative_error(got, expected) <= 1e-5


@pytest.mark.parametrize("kernel", ["reference", "fast"])
@pytest.mark.parametrize("channels,decimation,length", GEOMETRIES)
def test_synthesis_equals_upfirdn_oracle(rng, kernel, channels, decimation, length):
    """Output equals sum over k of mixup_k(upfirdn(g, Y[:, k], D, 1)) (brute force)."""
    taps = rng.standard_normal(length)
    frames = complex_noise(rng, 23 * channels).reshape(23, channels)
    expected = synthesis_oracle(taps, frames, channels, decimation)
    got = SynthesisBank(channels, decimation, taps, kernel=kernel).process(frames)
    assert got.dtype == np.complex64
    assert got.shape == (23 * decimation,)
    assert relative_error(got, expected) <= 1e-5


@settings(max_examples=40, deadline=None)
@given(geometry=st.sampled_from(GEOMETRIES), cuts=st.lists(st.integers(0, 400), max_size=8),
       seed=st.integers(0, 2**32 - 1))
def test_analysis_is_chunk_invariant(geometry, cuts, seed):
    """Any chunking of the input (empty chunks included) gives the one-call output."""
    channels, decimation, length = geometry
    rng = np.random.default_rng(seed)
    taps = rng.standard_normal(length)
    x = complex_noise(rng, 400)
    whole = AnalysisBank(channels, decimation, taps).process(x)
    bank = AnalysisBank(channels, decimation, taps)
    pieces = [bank.process(part) for part in np.split(x, sorted(cuts))]
    assert sum(len(p) for p in pieces) == len(whole) == -(-400 // decimation)
    assert relative_error(np.concatenate(pieces), whole) <= 1e-6


@settings(max_examples=40, deadline=None)
@given(geometry=st.sampled_from(GEOMETRIES), cuts=st.lists(st.integers(0, 30), max_size=6),
       seed=st.integers(0, 2**32 - 1))
def test_synthesis_is_chunk_invariant(geometry, cuts, seed):
    """Any chunking of the frames gives the one-call output, F*D samples in all."""
    channels, decimation, length = geometry
    rng = np.random.default_rng(seed)
    taps = rng.standard_normal(length)
    frames = complex_noise(rng, 30 * channels).reshape(30, channels)
    whole = SynthesisBank(channels, decimation, taps).process(frames)
    bank = SynthesisBank(channels, decimation, taps)
    pieces = [bank.process(part) for part in np.split(frames, sorted(cuts))]
    assert sum(len(p) for p in pieces) == len(whole) == 30 * decimation
    assert relative_error(np.concatenate(pieces), whole) <= 1e-6


def test_fast_kernel_matches_reference_on_long_prototype(rng):
    """The numba path equals the numpy reference for a long prototype over many frames."""
    taps = rng.standard_normal(16 * 256 + 1)
    x = complex_noise(rng, 256 * 64)
    fast = AnalysisBank(256, 128, taps).process(x)
    reference = AnalysisBank(256, 128, taps, kernel="reference").process(x)
    assert relative_error(fast, reference) <= 1e-5
    back_fast = SynthesisBank(256, 128, taps).process(fast)
    back_reference = SynthesisBank(256, 128, taps, kernel="reference").process(fast)
    assert relative_error(back_fast, back_reference) <= 1e-5


def test_frame_count_follows_ceil_rule(rng):
    """After N input samples, ceil(N / D) frames have been returned."""
    bank = AnalysisBank(8, 4, rng.standard_normal(20))
    total = 0
    for n, size in enumerate([0, 1, 3, 4, 5, 0, 11]):
        total += size
        bank.process(complex_noise(rng, size))
        assert bank.frames_produced == -(-total // 4)


def test_tone_lands_in_its_channel():
    """A tone at +3/M cycles/sample appears in channel 3, one at -2/M in channel M-2 (FFT order)."""
    M = 16
    assert channel_offsets(M)[3] == pytest.approx(3 / M)
    assert channel_offsets(M)[M - 2] == pytest.approx(-2 / M)
    m = np.arange(M * 200)
    taps = np.hanning(4 * M)
    for frequency, channel in [(3 / M, 3), (-2 / M, M - 2)]:
        frames = AnalysisBank(M, M // 2, taps / taps.sum()).process(np.exp(2j * np.pi * frequency * m))
        power = np.mean(np.abs(frames[20:]) ** 2, axis=0)
        assert int(np.argmax(power)) == channel
        assert power[channel] == pytest.approx(1.0, rel=1e-3)


def test_reset_restarts_absolute_time(rng):
    """reset() makes the next sample absolute sample 0 again."""
    taps = rng.standard_normal(40)
    x = complex_noise(rng, 100)
    bank = AnalysisBank(8, 4, taps)
    first = bank.process(x)
    bank.reset()
    assert np.array_equal(bank.process(x), first)


@pytest.mark.parametrize("kwargs,message", [
    (dict(channels=1, decimation=1, taps=[1.0]), "channels=1 is not an integer >= 2"),
    (dict(channels=8, decimation=3, taps=[1.0]), "decimation=3 does not divide channels=8"),
    (dict(channels=8, decimation=0, taps=[1.0]), "decimation=0 is not an integer >= 1"),
    (dict(channels=8, decimation=4, taps=[]), "non-empty 1-D"),
    (dict(channels=8, decimation=4, taps=[1j]), "must be real"),
    (dict(channels=8, decimation=4, taps=[np.nan]), "NaN"),
    (dict(channels=8, decimation=4, taps=[1.0], kernel="gpu"), "kernel='gpu'"),
    (dict(channels=8, decimation=4, taps=[1.0], threads=0), "threads=0 is not an integer from 1 to 64"),
    (dict(channels=8, decimation=4, taps=[1.0], threads=True), "threads=True is not an integer from 1 to 64"),
])
def test_bad_parameters_are_named(kwargs, message):
    """Bad constructor arguments raise ValueError naming the parameter and the rule."""
    with pytest.raises(ValueError, match=message.replace("(", r"\(").replace(")", r"\)")):
        AnalysisBank(**kwargs)


def test_bad_chunk_shapes_are_refused(rng):
    """A 2-D analysis chunk or wrongly shaped synthesis frames raise ValueError."""
    with pytest.raises(ValueError, match="1-D chunk"):
        AnalysisBank(8, 4, [1.0]).process(np.zeros((2, 2)))
    with pytest.raises(ValueError, match=r"shape \(F, 8\)"):
        SynthesisBank(8, 4, [1.0]).process(np.zeros((2, 7)))


@pytest.mark.parametrize("gap", [0, 3, 29, 30, 31, 200, 1001])
def test_analysis_skip_equals_zero_filled_gap(rng, gap):
    """skip(n) numbers frames as if n zeros had been fed, and returns exactly the non-zero ones."""
    taps = rng.standard_normal(30)
    before, after = complex_noise(rng, 57), complex_noise(rng, 80)
    reference = AnalysisBank(8, 4, taps).process(np.concatenate([before, np.zeros(gap, np.complex64), after]))
    bank = AnalysisBank(8, 4, taps)
    got = [bank.process(before), bank.skip(gap)]
    first_after = bank.frames_produced
    tail = bank.process(after)
    head = np.concatenate(got)
    assert relative_error(head, reference[:len(head)]) <= 1e-6
    assert np.all(reference[len(head):first_after] == 0)
    assert relative_error(tail, reference[first_after:]) <= 1e-6


@pytest.mark.parametrize("gap", [0, 2, 9, 40])
def test_synthesis_skip_equals_zero_frames(rng, gap):
    """SynthesisBank.skip(n) gives the output of n zero frames where non-zero, and keeps absolute time."""
    taps = rng.standard_normal(37)
    a, b = complex_noise(rng, 5 * 8).reshape(5, 8), complex_noise(rng, 6 * 8).reshape(6, 8)
    reference = SynthesisBank(8, 4, taps).process(np.concatenate([a, np.zeros((gap, 8)), b]))
    bank = SynthesisBank(8, 4, taps)
    head = np.concatenate([bank.process(a), bank.skip(gap)])
    start = bank.frames_consumed * 4
    tail = bank.process(b)
    assert relative_error(head, reference[:len(head)]) <= 1e-6
    assert np.all(np.abs(reference[len(head):start]) == 0)
    assert relative_error(tail, reference[start:]) <= 1e-6


@pytest.mark.parametrize("kernel", ["reference", "fast"])
@pytest.mark.parametrize("channels,decimation,taps_per_branch", [(64, 32, 8), (256, 256, 4), (100, 25, 3)])
def test_threads_give_bit_for_bit_the_output_of_one_thread(rng, kernel, channels, decimation, taps_per_branch):
    """Two and three threads share chunks big enough to be split (and one that is not): analysis frames
    and synthesis samples are identical to one thread's, bit for bit, chunk after chunk; one thread is
    itself held to scipy's brute force by the oracle tests above."""
    taps = rng.standard_normal(channels * taps_per_branch)
    x = complex_noise(rng, 300_000)
    cuts = [0, 150_000, 150_100, 300_000]
    one = AnalysisBank(channels, decimation, taps, kernel=kernel)
    back = SynthesisBank(channels, decimation, taps, kernel=kernel)
    expected = [one.process(x[a:b]) for a, b in zip(cuts, cuts[1:])]
    expected_back = [back.process(f) for f in expected]
    for threads in (2, 3):
        bank = AnalysisBank(channels, decimation, taps, kernel=kernel, threads=threads)
        merge = SynthesisBank(channels, decimation, taps, kernel=kernel, threads=threads)
        assert bank.threads == merge.threads == threads
        for (a, b), want, want_back in zip(zip(cuts, cuts[1:]), expected, expected_back):
            got = bank.process(x[a:b])
            assert np.array_equal(got, want)
            assert np.array_equal(merge.process(got), want_back)


@settings(max_examples=60, deadline=None)
@given(geometry=st.sampled_from(GEOMETRIES + [(1024, 512, 8192), (64, 64, 517)]), count=st.integers(1, 40),
       irregular=st.booleans(), seed=st.integers(0, 2**32 - 1))
def test_fast_fold_equals_reference_fold(geometry, count, irregular, seed):
    """The numba fold (frames one row apart folded four at a time, the rest one by one) equals the numpy
    reference fold frame for frame: evenly spaced windows with any number left over, and windows at
    arbitrary places (which the fast fold must take one by one)."""
    from bandloom.blocks.dsp import _polyphase_fast as fast
    from bandloom.blocks.dsp import _polyphase_reference as reference
    channels, decimation, length = geometry
    rng = np.random.default_rng(seed)
    taps = rng.standard_normal(length)
    starts = np.arange(count) * decimation
    if irregular:
        starts = np.sort(rng.integers(0, count * decimation + 1, count))
    buffer = complex_noise(rng, int(starts[-1]) + length)
    offsets = (starts + 7) % channels                 # the window's first sample's absolute index modulo M
    want = np.empty((count, channels), np.complex128)
    reference.fold_frames(buffer, reference.prepare_fold_taps(taps, channels), channels, starts, offsets, want)
    got = np.full((count, channels), np.nan, np.complex64)
    fast.fold_frames(buffer, fast.prepare_fold_taps(taps, channels), channels, starts, offsets, got)
    assert relative_error(got, want) <= 1e-5


@settings(max_examples=60, deadline=None)
@given(geometry=st.sampled_from(GEOMETRIES + [(1024, 512, 8192), (64, 64, 517)]), count=st.integers(1, 40),
       phase=st.integers(0, 10_000), cut=st.floats(0, 1), seed=st.integers(0, 2**32 - 1))
def test_fast_spread_equals_reference_spread(geometry, count, phase, cut, seed):
    """The numba spread (output rows four at a time over frames laid out one row apart, rows cut by the
    output range one by one) equals the numpy reference spread; and spreading the output in two ranges,
    as two threads do, gives bit for bit what one range gives."""
    from bandloom.blocks.dsp import _polyphase_fast as fast
    from bandloom.blocks.dsp import _polyphase_reference as reference
    channels, decimation, length = geometry
    phase = phase // decimation * decimation % channels        # the banks' phase is a multiple of D
    rng = np.random.default_rng(seed)
    taps = rng.standard_normal(length)
    frames = complex_noise(rng, count * channels).reshape(count, channels)
    size = (count - 1) * decimation + length
    want = np.zeros(size, np.complex128)
    reference.spread_frames(frames, reference.prepare_spread_taps(taps, channels), decimation, channels, phase, want)
    prepared = fast.prepare_spread_taps(taps, channels)
    whole = np.zeros(size, np.complex64)
    fast.spread_frames(frames, prepared, decimation, channels, phase, whole)
    assert relative_error(whole, want) <= 1e-5
    split = int(cut * size)
    halves = np.zeros(size, np.complex64)
    fast.spread_frames(frames, prepared, decimation, channels, phase, halves, 0, split)
    fast.spread_frames(frames, prepared, decimation, channels, phase, halves, split, size)
    assert halves.tobytes() == whole.tobytes()


def test_the_kernels_compiled_under_another_module_name_do_not_poison_the_cache(tmp_path):
    """The kernel file imported from the source tree as ``blocks.dsp._polyphase_fast`` (a developer's
    script) and then the installed bank, both with one numba cache folder: the bank still runs. numba keys
    its cache by source file and pickles the module's name into it; a foreign entry made every later
    process fail with ModuleNotFoundError (found 2026-12-03)."""
    import os
    import subprocess
    import sys
    from pathlib import Path

    import bandloom.blocks
    tree = Path(bandloom.blocks.__file__).resolve().parent.parent     # holds a folder named "blocks"
    env = {**os.environ, "NUMBA_CACHE_DIR": str(tmp_path / "numba")}
    foreign = ("import sys, numpy as np; sys.path.insert(0, sys.argv[1]); "
               "import blocks.dsp.banks as b; "
               "print(b.AnalysisBank(8, 4, np.ones(24)).process(np.ones(64, np.complex64)).shape)")
    installed = ("import numpy as np; from bandloom.blocks.dsp import AnalysisBank; "
                 "print(AnalysisBank(8, 4, np.ones(24)).process(np.ones(64, np.complex64)).shape)")
    for code in (foreign, installed, installed):
        run = subprocess.run([sys.executable, "-c", code, str(tree)], env=env, cwd=tmp_path, capture_output=True, text=True,
                             timeout=300)
        assert run.returncode == 0, run.stderr[-2000:]
        assert run.stdout.strip() == "(16, 8)"
    assert list((tmp_path / "numba").rglob("*.nbi")), "the installed kernels were not cached"


@pytest.mark.parametrize("kernel", ["reference", "fast"])
@pytest.mark.parametrize("threads", [1, 2])
def test_frames_written_where_the_caller_says_are_the_frames_returned(rng, kernel, threads):
    """process(x, out=room) writes into ``room`` and returns it, bit for bit what process(x) returns,
    chunk after chunk (the first chunk's frames partly from history, the rest from the chunk);
    frames_for tells the room's rows beforehand."""
    taps = rng.standard_normal(64 * 8)
    x = complex_noise(rng, 200_000)
    plain = AnalysisBank(64, 32, taps, kernel=kernel, threads=threads)
    placed = AnalysisBank(64, 32, taps, kernel=kernel, threads=threads)
    for a, b in [(0, 1000), (1000, 1001), (1001, 150_000), (150_000, 200_000)]:
        want = plain.process(x[a:b])
        room = np.full((placed.frames_for(b - a), 64), np.nan, dtype=np.complex64)
        got = placed.process(x[a:b], out=room)
        assert got is room and np.array_equal(got, want)
    assert placed.frames_produced == plain.frames_produced


@pytest.mark.parametrize("bad", [np.zeros((3, 64), np.complex64), np.zeros((4, 64), np.complex128),
                                 np.zeros((64, 4), np.complex64).T, [[0j] * 64] * 4])
def test_a_room_of_the_wrong_kind_is_refused_naming_out(rng, bad):
    """``out`` of the wrong shape, type or layout (or not an array) is refused before any input is taken."""
    bank = AnalysisBank(64, 32, rng.standard_normal(256))
    x = complex_noise(rng, 128)                       # 4 frames
    assert bank.frames_for(len(x)) == 4
    with pytest.raises(ParameterError, match="out must be a writeable C-contiguous complex64 array of shape"):
        bank.process(x, out=bad)
    assert bank.frames_produced == 0 and bank.frames_for(len(x)) == 4
