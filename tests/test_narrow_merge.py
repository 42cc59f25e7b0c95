"""synthesis with output = "group": adjacent channels merged at the group's own rate by a bank of its own size.

The oracle (scipy): the full-rate merge of the same channels, shifted down to the group's centre and
resampled with scipy.signal.resample_poly (its Kaiser window with beta 14, since the default beta 5 filter's
own passband error is about -60 dB). Outputs agree to <= -100 dB between the outer
channels' centres, the region a group reconstructs exactly.
"""

from fractions import Fraction
from pathlib import Path

import numpy as np
import pytest
import scipy.signal
from bandloom.blocks.block import BlockContext, BlockError, Chunk, StreamInfo
from bandloom.blocks.channelizer import Channelizer, Synthesis
from runner import run_flow

FLOWS = Path(__file__).parent.parent / "flows"


def make(cls, **params):
    full = {p.name: p.default for p in cls.parameters if not p.required}
    full.update(params)
    return cls(full, BlockContext("b", Path("x.toml"), Path(".")))


def channelized(M, P, rate, centre, seed=3, frames=3000):
    rng = np.random.default_rng(seed)
    x = ((rng.standard_normal(M * frames) + 1j * rng.standard_normal(M * frames)) / 2).astype(np.complex64)
    wide = StreamInfo("samples", "cf32", rate, centre)
    split = make(Channelizer, channels=M, oversample=P)
    channels = split.output_streams({"samples": wide})["channels"]
    split.start({"samples": wide})
    return channels, np.concatenate([c.data for c in split.consume("samples", Chunk(x, 0))["channels"]])


def merged(stream, data, **params):
    block = make(Synthesis, **params)
    out = block.output_streams({"channels": stream})["samples"]
    block.start({"channels": stream})
    return out, np.concatenate([c.data for c in block.consume("channels", Chunk(data, 0))["samples"]])


@pytest.mark.parametrize("M,P,group", [(64, 2, [10, 11, 12, 13]), (32, 4, [30, 31, 0, 1, 2]), (64, 2, [62, 63, 0])])
def test_a_group_merged_at_its_own_rate_equals_the_full_merge_shifted_and_resampled(M, P, group):
    """Rate = channels x oversample x spacing, centre midway between the outer channels; between the outer
    channels' centres the output equals the oracle's to <= -100 dB (measured: about -135 dB)."""
    rate, centre = 6.4e6, 100e6
    channels, Y = channelized(M, P, rate, centre)
    selected = channels.select(group)
    out, y = merged(selected, Y[:, group], output="group")
    spacing = channels.channel_spacing
    lo = min(channels.channel_frequencies[k] for k in group)
    hi = max(channels.channel_frequencies[k] for k in group)
    assert out.sample_rate == pytest.approx(len(group) * P * spacing)
    assert out.centre_frequency == pytest.approx((lo + hi) / 2)
    full_stream, z = merged(selected, Y[:, group])
    z = z.astype(np.complex128) * np.exp(-2j * np.pi * (out.centre_frequency - centre) / rate * np.arange(len(z)))
    ratio = Fraction(out.sample_rate / rate).limit_denominator(1000)
    up, down = ratio.numerator, ratio.denominator
    oracle = scipy.signal.resample_poly(z, up, down, window=("kaiser", 14.0))
    assert out.design["round_trip_delay"] * rate == pytest.approx(full_stream.design["round_trip_delay"] * out.sample_rate)
    a, b = y[2000:len(y) - 2000].astype(np.complex128), oracle[2000:len(y) - 2000]
    window = np.blackman(len(a))
    f = np.fft.fftfreq(len(a)) * out.sample_rate + out.centre_frequency
    inside = (f >= lo) & (f <= hi)
    error = np.abs(np.fft.fft((a - b) * window)) ** 2
    reference = np.abs(np.fft.fft(b * window)) ** 2
    assert 10 * np.log10(error[inside].sum() / reference[inside].sum()) <= -100


def test_a_group_must_be_adjacent_channels_of_an_oversampled_bank():
    """Channels with a gap between them, or a critically sampled channelizer, are refused naming 'output'."""
    channels, Y = channelized(16, 2, 1.6e6, 0.0, frames=10)
    with pytest.raises(BlockError, match="merges adjacent channels; the link brings channels 2, 3, 5") as caught:
        merged(channels.select([2, 3, 5]), Y[:, [2, 3, 5]], output="group")
    assert caught.value.param == "output"
    critical, Yc = channelized(16, 1, 1.6e6, 0.0, frames=10)
    with pytest.raises(BlockError, match="needs an oversampled channelizer"):
        merged(critical.select([2, 3]), Yc[:, [2, 3]], output="group")


def test_a_narrow_merge_runs_as_processes_and_its_file_says_its_rate(tmp_path):
    """flows/group-merge.toml as processes: 6.4 Msps -> channelizer (32 x 200 kHz) -> the channels centred in
    100.2-100.6 MHz -> synthesis (group) -> iq-writer. The file holds 1 s at 3 x 2 x 200 kHz = 1.2 Msps (not
    the 6.4 Msps input rate), centred midway between the outer channels (100.4 MHz)."""
    import json
    done, report = run_flow(FLOWS / "group-merge.toml", tmp_path / "out")
    assert done.returncode == 0, done.stderr
    meta = json.loads((tmp_path / "out" / "group.sigmf-meta").read_text())
    assert meta["global"]["core:sample_rate"] == 1.2e6
    assert meta["captures"][0]["core:frequency"] == pytest.approx(100.4e6)
    samples = (tmp_path / "out" / "group.sigmf-data").stat().st_size // 8
    assert samples == pytest.approx(1.0 * 1.2e6, abs=64)
    assert report["lost_samples"] == 0
