"""Demodulators, resampler and activity detector against textbook definitions and scipy."""

import numpy as np
import pytest
import scipy.signal
from bandloom.blocks.dsp.activity import ActivityDetector
from bandloom.blocks.dsp.demod import AMDemodulator, FMDemodulator
from bandloom.blocks.dsp.resample import Resampler
from conftest import complex_noise

RATE = 50_000.0


def sinad_db(audio, rate, tone):
    """SINAD of a tone: total power over what is left after a least-squares fit of the tone (common practice)."""
    t = np.arange(len(audio)) / rate
    basis = np.stack([np.sin(2 * np.pi * tone * t), np.cos(2 * np.pi * tone * t), np.ones_like(t)], axis=1)
    coeffs, *_ = np.linalg.lstsq(basis, audio, rcond=None)
    residual = audio - basis @ coeffs
    amplitude = np.hypot(coeffs[0], coeffs[1])
    return 10 * np.log10(np.sum((audio - coeffs[2]) ** 2) / np.sum(residual ** 2)), amplitude


def fm_tone(deviation, tone=1000.0, seconds=1.0):
    t = np.arange(int(seconds * RATE)) / RATE
    phase = 2 * np.pi * deviation * (1 - np.cos(2 * np.pi * tone * t)) / (2 * np.pi * tone)
    return np.exp(1j * phase).astype(np.complex64)


def test_fm_discriminator_tone_sinad():
    """1 kHz tone at 5 kHz deviation (noise-free) demodulates to a 1 kHz tone with SINAD >= 40 dB (common practice)."""
    audio = FMDemodulator(RATE, full_scale=5000).process(fm_tone(5000))
    sinad, amplitude = sinad_db(audio[100:].astype(np.float64), RATE, 1000.0)
    assert sinad >= 40.0
    assert amplitude == pytest.approx(1.0, abs=0.01)      # 5 kHz deviation = full scale


def test_fm_level_follows_deviation_linearly():
    """The audio level is proportional to the deviation, 1 to 5 kHz (common practice)."""
    amplitudes = [sinad_db(FMDemodulator(RATE, full_scale=5000).process(fm_tone(dev))[100:].astype(float),
                           RATE, 1000.0)[1] for dev in (1000, 2000, 3000, 4000, 5000)]
    assert np.allclose(np.array(amplitudes) / np.array([1, 2, 3, 4, 5]), amplitudes[0], rtol=1e-3)


def test_fm_chunking_does_not_change_the_audio():
    """The discriminator carries its last sample across chunks."""
    x = fm_tone(3000, seconds=0.2)
    whole = FMDemodulator(RATE).process(x)
    demod = FMDemodulator(RATE)
    parts = np.concatenate([demod.process(p) for p in np.split(x, [7, 300, 4001])])
    assert np.allclose(parts, whole)


def test_fm_squelch_mutes_a_noise_only_channel(rng):
    """Below the squelch level the output is silent; above it the tone passes."""
    noise = (1e-4 * complex_noise(rng, 20000)).astype(np.complex64)
    assert np.all(FMDemodulator(RATE, squelch=-60).process(noise)[200:] == 0)
    tone = 0.1 * fm_tone(2500, seconds=0.4)
    assert np.max(np.abs(FMDemodulator(RATE, full_scale=2500, squelch=-60).process(tone)[200:])) > 0.9


def am_tone(depth, tone=1000.0, seconds=2.0, carrier=0.3):
    t = np.arange(int(seconds * RATE)) / RATE
    return (carrier * (1 + depth * np.sin(2 * np.pi * tone * t)) * np.exp(0.7j)).astype(np.complex64)


def test_am_envelope_tone_sinad_and_depth():
    """A 1 kHz tone at 50 % depth returns a 1 kHz tone of amplitude 0.5 with SINAD >= 40 dB (common practice)."""
    audio = AMDemodulator(RATE).process(am_tone(0.5))[int(RATE):].astype(np.float64)
    sinad, amplitude = sinad_db(audio, RATE, 1000.0)
    assert sinad >= 40.0
    assert amplitude == pytest.approx(0.5, rel=0.01)


def test_am_level_follows_depth_linearly():
    """The audio level is proportional to the modulation depth, 20 % to 80 % (common practice)."""
    depths = np.array([0.2, 0.4, 0.6, 0.8])
    amplitudes = np.array([sinad_db(AMDemodulator(RATE).process(am_tone(m))[int(RATE):].astype(float), RATE,
                                    1000.0)[1] for m in depths])
    assert np.allclose(amplitudes / depths, 1.0, rtol=0.01)


@pytest.mark.parametrize("up,down", [(24, 25), (48, 50), (3, 2), (1, 6), (160, 147), (2, 1)])
def test_resampler_equals_resample_poly(rng, up, down):
    """Streamed in uneven chunks, the resampler equals scipy.signal.resample_poly on the whole data (reference library)."""
    x = complex_noise(rng, 3001, np.complex128)
    expected = scipy.signal.resample_poly(x, up, down)
    resampler = Resampler(up, down)
    pieces = [resampler.process(p) for p in np.split(x, [1, 2, 500, 501, 2222])] + [resampler.finish()]
    got = np.concatenate(pieces)
    assert got.shape == expected.shape
    assert np.max(np.abs(got - expected)) <= 1e-12 * np.max(np.abs(expected))


def test_resampler_real_audio_equals_resample_poly(rng):
    """Real input stays real and equal to resample_poly (reference library)."""
    x = rng.standard_normal(5000)
    r = Resampler(48000, 50000)
    got = np.concatenate([r.process(x[:1234]), r.process(x[1234:]), r.finish()])
    assert not np.iscomplexobj(got)
    assert np.allclose(got, scipy.signal.resample_poly(x, 24, 25), atol=1e-12)


def test_activity_detector_events_with_hysteresis_and_minimum_duration(rng):
    """A burst 20 dB over the floor turns on after min_duration and off again; a 30 ms blip is ignored."""
    rate, n = 10_000.0, 30_000
    rows = 1e-3 * complex_noise(rng, n * 8).reshape(n, 8)          # floor -60 + 3 = -57 dBFS... per channel
    rows[10_000:20_000, 3] += 1e-2                                  # channel 3 on from 1.0 s to 2.0 s
    rows[25_000:25_300, 5] += 1e-1                                  # 30 ms blip on channel 5
    detector = ActivityDetector(8, rate, interval=0.01, threshold=10, hysteresis=4, min_duration=0.05)
    events = detector.process(rows[:12_345]) + detector.process(rows[12_345:]) + detector.finish()
    assert [(e.column, e.kind) for e in events] == [(3, "on"), (3, "off")]
    assert events[0].time == pytest.approx(1.0, abs=0.011) and events[1].time == pytest.approx(2.0, abs=0.011)
    assert events[0].level_db == pytest.approx(10 * np.log10(1e-4 + 2e-6), abs=0.3)
    summary = detector.summary()
    assert summary[3]["duty_cycle"] == pytest.approx(1 / 3, abs=0.01)
    assert summary[0]["duty_cycle"] == 0 and summary[5]["duty_cycle"] == 0


def test_waterfall_boxes_start_and_end_where_the_detector_dates_the_burst(tmp_path):
    """A burst on from 0.6 s to 1.0 s (the end of the stream) in one of 8 channels: the boxes cover exactly
    0.60-1.00 s (0.6 / 0.05 is 11.999999999999998 in floating point: the box must not start an interval
    early), and one from 0.2 s to 0.5 s exactly 0.20-0.50 s."""
    from pathlib import Path as _Path

    from bandloom.blocks.block import BlockContext, Chunk, StreamInfo
    from bandloom.blocks.monitors import Waterfall
    params = {p.name: p.default for p in Waterfall.parameters if not p.required}
    params.update(path="w.png")
    block = Waterfall(params, BlockContext("w", _Path("x.toml"), tmp_path))
    rate, width = 50_000.0, 8
    channels = StreamInfo("channels", "cf32", rate, 1e8, channels=tuple(range(width)),
                          channel_frequencies=tuple(1e8 + np.fft.fftfreq(width) * width * rate / 2),
                          channel_count=width, channel_spacing=rate / 2)
    band = StreamInfo("samples", "cf32", width * rate / 2, 1e8)
    block.output_streams({"samples": band, "channels": channels})
    block.start({"samples": band, "channels": channels})
    rng = np.random.default_rng(1)
    t = np.arange(int(rate)) / rate
    x = ((rng.standard_normal((len(t), width)) + 1j * rng.standard_normal((len(t), width))) * 1e-3).astype(np.complex64)
    x[(t >= 0.2) & (t < 0.5), 3] += 0.1
    x[t >= 0.6, 5] += 0.1
    for i in range(0, len(t), 5000):
        block.consume("channels", Chunk(x[i:i + 5000], i))
    block.finish()
    for column, (start, stop) in ((3, (0.2, 0.5)), (5, (0.6, 1.0))):
        on = np.nonzero(block.bins[:, column])[0]
        assert on.min() * block.bin_seconds == pytest.approx(start)
        assert (on.max() + 1) * block.bin_seconds == pytest.approx(stop)
