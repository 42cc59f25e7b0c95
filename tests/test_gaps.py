"""Every block type carries a gap through: N missing input samples become the corresponding gap (or counted
zero fill) at the output's rate, and the output's indices stay in absolute time.

Each test feeds a block a stream with one gap, as the runtime does after a loss (the chunk after the gap
starts later and says how many rows are missing before it), and checks the output's indices and counts,
and the values against an outside definition of the same stream with the gap as zeros.
"""

import json
import subprocess
import sys
import tracemalloc
import wave

import numpy as np
import pytest
import scipy.signal
from bandloom.blocks.block import BlockContext, Chunk, StreamInfo
from bandloom.blocks.dsp.demod import FMDemodulator
from bandloom.runtime.plugins import load_registry
from conftest import analysis_oracle, complex_noise, synthesis_oracle

REGISTRY = load_registry()
RATE = 48_000.0


def make_block(type_name, params, tmp_path, inputs):
    """Build and start a block the way a worker does: declared defaults, then the given parameters."""
    cls = REGISTRY.types[type_name]
    full = {p.name: p.default for p in cls.parameters if not p.required}
    full.update(params)
    block = cls(full, BlockContext("b", tmp_path / "flow.toml", tmp_path))
    block.output_streams(dict(inputs))
    block.start(dict(inputs))
    return block


def with_gap(data, start, length):
    """The chunks a block sees when rows [start, start + length) were lost upstream."""
    return [Chunk(data[:start], 0), Chunk(data[start + length:], start + length, discontinuity=True, dropped=length)]


def feed(block, port, chunks):
    """Every output chunk, by port, in order; finish() included."""
    out: dict[str, list[Chunk]] = {}
    for chunk in chunks:
        for name, produced in block.consume(port, chunk).items():
            out.setdefault(name, []).extend(produced if isinstance(produced, list) else [produced])
    for name, produced in block.finish().items():
        out.setdefault(name, []).extend(produced if isinstance(produced, list) else [produced])
    block.close()
    return out


def placed(chunks, length):
    """The output laid out in absolute time: values, and which indices were delivered."""
    first = chunks[0].data
    values = np.zeros((length,) + first.shape[1:], first.dtype)
    present = np.zeros(length, bool)
    for c in chunks:
        assert not present[c.first_index:c.first_index + c.count].any(), "two chunks cover the same index"
        values[c.first_index:c.first_index + c.count] = c.data
        present[c.first_index:c.first_index + c.count] = True
    return values, present


def samples(rate=RATE, sample_type="cf32", centre=100e6):
    return StreamInfo("samples", sample_type, rate, centre)


def test_shift_keeps_absolute_time_across_a_gap(tmp_path, rng):
    """Output n is input n times exp(-2 pi i f n / rate), n absolute (definition of a frequency shift)."""
    x = complex_noise(rng, 4000)
    block = make_block("shift", {"offset": 3000.0}, tmp_path, {"samples": samples()})
    out = feed(block, "samples", with_gap(x, 1500, 700))["samples"]
    values, present = placed(out, len(x))
    assert [c.first_index for c in out] == [0, 2200]
    assert np.count_nonzero(~present) == 700 and not present[1500:2200].any()
    n = np.arange(len(x))
    expected = x * np.exp(-2j * np.pi * 3000.0 * n / RATE)
    assert np.allclose(values[present], expected[present], atol=1e-5)


@pytest.mark.parametrize("rate, gap", [(16_000.0, 9000), (72_000.0, 5000), (8_000.0, 20)])
def test_resample_turns_a_gap_into_a_gap_at_the_output_rate(tmp_path, rng, rate, gap):
    """Equal to scipy.signal.resample_poly of the stream with the gap as zeros (reference library); the
    outputs that see only the gap are a gap, not samples, and the end index is resample_poly's length."""
    x = complex_noise(rng, 24000)
    block = make_block("resample", {"rate": rate}, tmp_path, {"samples": samples()})
    filled = x.copy()
    filled[6000:6000 + gap] = 0
    expected = scipy.signal.resample_poly(filled, *{16_000.0: (1, 3), 72_000.0: (3, 2), 8_000.0: (1, 6)}[rate])
    out = feed(block, "samples", with_gap(x, 6000, gap))["samples"]
    assert block.end_index("samples") == len(expected)
    values, present = placed(out, len(expected))
    assert np.max(np.abs(values[present] - expected[present])) <= 1e-5 * np.max(np.abs(expected))
    missing = np.count_nonzero(~present)
    assert missing == block.skipped_out
    assert np.all(np.abs(expected[~present]) <= 1e-12)                 # what was skipped is exactly silence
    if gap > 200:             # a long gap: nearly all of it stays a gap at the new rate
        assert missing >= gap * rate / RATE - 40
    assert f"{gap} input samples missing in 1 gaps" in block.report()[0]


def test_fm_demod_keeps_indices_and_does_not_click_after_a_gap(tmp_path):
    """The audio's indices are the input's; after the gap the discriminator starts afresh (first sample 0,
    then the same audio as a demodulator started there)."""
    t = np.arange(9600) / RATE
    x = np.exp(2j * np.pi * 1000 * t + 1j * 2.5 * np.sin(2 * np.pi * 400 * t)).astype(np.complex64)
    stream = samples(sample_type="cf32")
    block = make_block("fm-demod", {"deemphasis": 750e-6}, tmp_path, {"samples": stream})
    out = feed(block, "samples", with_gap(x, 3000, 1234))["audio"]
    assert [c.first_index for c in out] == [0, 4234] and sum(c.count for c in out) == 9600 - 1234
    fresh = FMDemodulator(RATE, full_scale=5000.0, deemphasis=750e-6).process(x[4234:])
    assert abs(out[1].data[0]) < 1e-6
    carried = FMDemodulator(RATE, full_scale=5000.0, deemphasis=750e-6)      # phase carried across: a click
    carried.process(x[:3000])
    assert abs(carried.process(x[4234:])[0]) > 100 * abs(out[1].data[0]) + 0.01
    assert np.allclose(out[1].data, fresh, atol=1e-6)


def test_am_demod_keeps_indices_across_a_gap(tmp_path):
    t = np.arange(9600) / RATE
    x = ((1 + 0.5 * np.sin(2 * np.pi * 700 * t)) * 0.1).astype(np.complex64)
    block = make_block("am-demod", {}, tmp_path, {"samples": samples()})
    out = feed(block, "samples", with_gap(x, 5000, 100))["audio"]
    assert [c.first_index for c in out] == [0, 5100] and sum(c.count for c in out) == 9500


def tone_channels(seconds, rate, on, off, columns=8, column=3, level=0.3, seed=1):
    """Rows of ``columns`` channels of low noise, one of them carrying a carrier between on and off seconds."""
    rng = np.random.default_rng(seed)
    n = int(seconds * rate)
    rows = (1e-3 * complex_noise(rng, n * columns)).reshape(n, columns)
    rows[int(on * rate):int(off * rate), column] += level
    return rows


def test_activity_dates_events_in_absolute_time_across_a_gap(tmp_path):
    """A burst from 0.2 to 0.8 s with 0.1 s of the stream lost in its middle: 'on' at 0.2, 'off' at 0.8 (not
    0.7, as a detector counting only the rows it saw would say); the gap is reported, not measured."""
    rate = 10_000.0
    rows = tone_channels(1.0, rate, 0.2, 0.8)
    stream = StreamInfo("channels", "cf32", rate, 100e6, channels=tuple(range(8)),
                        channel_frequencies=tuple(100e6 + 1e4 * k for k in range(8)), channel_count=8,
                        channel_spacing=1e4)
    block = make_block("activity", {"path": "events.csv", "interval": 0.01, "min_duration": 0.02}, tmp_path,
                       {"channels": stream})
    feed(block, "channels", with_gap(rows, 4000, 1000))
    events = [line.split(",") for line in (tmp_path / "events.csv").read_text().splitlines()[1:]]
    assert [(e[1], e[4]) for e in events] == [("3", "on"), ("3", "off")]
    assert float(events[0][0]) == pytest.approx(0.2, abs=0.011)
    assert float(events[1][0]) == pytest.approx(0.8, abs=0.011)
    assert "1000 rows missing in 1 gaps were not measured" in "\n".join(block.report())


def waterfall_inputs(rate, columns=8):
    wide = samples(rate=rate)
    channels = StreamInfo("channels", "cf32", rate / columns * 2, 100e6, channels=tuple(range(columns)),
                          channel_frequencies=tuple(100e6 + rate / columns * k for k in range(columns)),
                          channel_count=columns, channel_spacing=rate / columns)
    return {"samples": wide, "channels": channels}


def test_waterfall_leaves_a_gap_blank_and_keeps_time(tmp_path, rng):
    """A gap of 5000 samples with fft_size 256 leaves the 20 or 21 segments it touches blank; rows after the
    gap stay where they belong in time (the row count covers the whole stream)."""
    pytest.importorskip("matplotlib")
    inputs = waterfall_inputs(RATE)
    block = make_block("waterfall", {"path": "w.png", "fft_size": 256, "rows": 1000}, tmp_path, inputs)
    x = complex_noise(rng, 256 * 100)
    for chunk in with_gap(x, 256 * 30 + 10, 5000):
        block.consume("samples", chunk)
    block.finish()
    rows = np.array(block.rows)
    assert len(rows) == 100                                      # every segment of time has its row
    blank = np.isnan(rows).all(axis=1)
    assert blank.sum() == len(range((256 * 30 + 10) // 256, -(-(256 * 30 + 10 + 5000) // 256)))
    assert not np.isnan(rows[~blank]).any()
    block.close()
    assert (tmp_path / "w.png").stat().st_size > 10_000
    assert "5000 samples missing in 1 gaps left blank" in block.report()[0]


def test_waterfall_memory_stays_flat_over_a_long_run(tmp_path):
    """Rows and activity are folded as time goes on: after 4 and after 64 picture-heights of stream the
    block holds the same number of rows and bins (at most 'rows'), and memory does not grow."""
    pytest.importorskip("matplotlib")
    rate = 8000.0
    inputs = waterfall_inputs(rate)
    block = make_block("waterfall", {"path": "w.png", "fft_size": 16, "rows": 50, "interval": 0.01,
                                     "min_duration": 0.01}, tmp_path, inputs)
    burst = tone_channels(1.0, rate / 4, 0.3, 0.6)                 # one second of channels with a burst
    wide = np.zeros(int(rate), np.complex64)
    sizes = []
    tracemalloc.start()
    for second in range(64):
        block.consume("samples", Chunk(wide, second * len(wide)))
        block.consume("channels", Chunk(burst, second * len(burst)))
        if second in (3, 63):
            sizes.append((len(block.rows), len(block.bins), tracemalloc.get_traced_memory()[0]))
    tracemalloc.stop()
    block.finish()
    (rows_4, bins_4, memory_4), (rows_64, bins_64, memory_64) = sizes
    assert rows_4 <= 50 and rows_64 <= 50 and bins_4 <= 50 and bins_64 <= 50
    assert memory_64 < memory_4 + 200_000
    assert block.bins.any(axis=0)[3] and not block.bins.any(axis=0)[0]
    block.close()


def test_iq_writer_zero_fills_a_gap_and_annotates_it(tmp_path, rng):
    """A raw file cannot mark a gap: zeros keep absolute time, and the SigMF annotation says where."""
    x = complex_noise(rng, 3000)
    block = make_block("iq-writer", {"path": "x.sigmf-data"}, tmp_path, {"samples": samples()})
    feed(block, "samples", with_gap(x, 1000, 500))
    written = np.fromfile(tmp_path / "x.sigmf-data", np.complex64)
    assert len(written) == 3000 and not written[1000:1500].any()
    assert np.array_equal(written[1500:], x[1500:])
    meta = json.loads((tmp_path / "x.sigmf-meta").read_text())
    assert [(a["core:sample_start"], a["core:sample_count"]) for a in meta["annotations"]] == [(1000, 500)]


def test_wav_writer_writes_silence_of_the_gaps_length(tmp_path):
    audio = np.full(4800, 0.25, np.float32)
    block = make_block("wav-writer", {"path": "a.wav"}, tmp_path, {"audio": samples(sample_type="f32")})
    feed(block, "audio", with_gap(audio, 1000, 2000))
    with wave.open(str(tmp_path / "a.wav")) as w:
        frames = np.frombuffer(w.readframes(w.getnframes()), np.int16)
    assert len(frames) == 4800 and not frames[1000:3000].any() and frames[3000] == 8192
    assert "2000 of them silence for missing input" in block.report()[0]


def test_stdout_writer_zero_fills_a_gap(tmp_path, rng, capfdbinary):
    x = complex_noise(rng, 2000)
    block = make_block("stdout-writer", {}, tmp_path, {"samples": samples()})
    feed(block, "samples", with_gap(x, 700, 300))
    written = np.frombuffer(capfdbinary.readouterr().out, np.complex64)
    assert len(written) == 2000 and not written[700:1000].any() and np.array_equal(written[1000:], x[1000:])
    assert "and 300 zeros for missing input" in block.report()[0]


def test_discard_counts_a_gap(tmp_path, rng):
    block = make_block("discard", {}, tmp_path, {"samples": samples()})
    feed(block, "samples", with_gap(complex_noise(rng, 2000), 700, 300))
    assert block.report() == ["discarded 1700 samples; 1 gaps, 300 samples missing"]


def test_compare_counts_a_gap_as_error(tmp_path, rng):
    """A gap on the tested stream is compared as zeros: it shows in the error and is named."""
    x = complex_noise(rng, 20000)
    block = make_block("compare", {"delay": 0}, tmp_path, {"reference": samples(), "test": samples()})
    block.consume("reference", Chunk(x, 0))
    for chunk in with_gap(x, 10000, 2000):
        block.consume("test", chunk)
    block.finish()
    figures = block.figures()
    assert figures["missing_samples"] == {"reference": 0, "test": 2000}
    assert figures["error_db"] == pytest.approx(10 * np.log10(np.sum(np.abs(x[10000:12000]) ** 2) /
                                                             np.sum(np.abs(x) ** 2)), abs=0.01)
    assert "2000 samples missing on 'test', compared as zeros" in block.report()


def test_channelizer_skips_the_frames_a_gap_covers(tmp_path, rng):
    """Frames present equal the brute-force analysis of the zero-filled input (scipy.signal.upfirdn per
    channel, conftest.analysis_oracle); frames that saw only the gap are a gap, and they are exactly zero
    in the oracle."""
    x = complex_noise(rng, 8 * 600)
    block = make_block("channelizer", {"channels": 8}, tmp_path, {"samples": samples(rate=80_000.0)})
    out = feed(block, "samples", with_gap(x, 8 * 100 + 3, 8 * 300))["channels"]
    filled = x.copy()
    filled[803:803 + 2400] = 0
    bank = block.bank
    expected = analysis_oracle(bank.taps, filled, 8, bank.decimation)
    values, present = placed(out, block.end_index("channels"))
    assert block.end_index("channels") == len(expected)
    assert np.max(np.abs(values[present] - expected[present])) <= 1e-5 * np.max(np.abs(expected))
    assert np.count_nonzero(~present) > 0.8 * 2400 / bank.decimation
    assert np.all(np.abs(expected[~present]) <= 1e-9)


def test_synthesis_skips_the_samples_a_gap_of_frames_covers(tmp_path, rng):
    """Output samples present equal the brute-force synthesis of the zero-filled frames
    (conftest.synthesis_oracle, scipy.signal.upfirdn); the ones that see only the gap are a gap."""
    design_input = make_block("channelizer", {"channels": 8}, tmp_path, {"samples": samples(rate=80_000.0)})
    stream = design_input.output_streams({"samples": samples(rate=80_000.0)})["channels"]
    frames = complex_noise(rng, 600 * 8).reshape(600, 8)
    block = make_block("synthesis", {}, tmp_path, {"channels": stream})
    out = feed(block, "channels", with_gap(frames, 100, 300))["samples"]
    filled = frames.copy()
    filled[100:400] = 0
    bank = block.bank
    expected = synthesis_oracle(bank.taps, filled, 8, block.design.decimation)
    values, present = placed(out, block.end_index("samples"))
    assert block.end_index("samples") == len(expected)
    assert np.max(np.abs(values[present] - expected[present])) <= 1e-5 * np.max(np.abs(expected))
    assert np.count_nonzero(~present) > 0.8 * 300 * block.design.decimation
    assert np.all(np.abs(expected[~present]) <= 1e-9)


def test_a_live_source_dropping_input_gives_audio_of_the_full_length(tmp_path, rng):
    """Real processes: a live source told to drop (its consumer is held back by a slow sink) loses
    buffers; after the resampler the WAV still has exactly the resampled length of everything that
    was piped in (resample_poly's length, ceil(N / 4)), its silence is the gaps the link counted, and
    the resampler's input and the source's drops agree."""
    total = 2_000_000
    payload = (rng.standard_normal(2 * total).astype(np.float32) * 0.1).tobytes()
    flow = tmp_path / "live.toml"
    flow.write_text('[blocks.live]\ntype = "stdin-reader"\nsample_rate = "8 MHz"\nwhen_full = "drop"\n'
                    'buffer = "5 ms"\nbuffer_size = 20000\n'
                    '[blocks.down]\ntype = "resample"\nrate = "2 MHz"\n'
                    '[blocks.audio]\ntype = "wav-writer"\npath = "band.wav"\n'
                    '[blocks.slow]\ntype = "discard"\nrate_limit = "1 MHz"\n'
                    '[[links]]\nfrom = "live.samples"\nto = "down.samples"\nqueue = 2\n'
                    '[[links]]\nfrom = "down.samples"\nto = "audio.audio"\nqueue = 2\n'
                    '[[links]]\nfrom = "down.samples"\nto = "slow.samples"\nqueue = 2\n')
    report_path = tmp_path / "report.json"
    done = subprocess.run([sys.executable, "-m", "bandloom.runtime", "run", str(flow), "--quiet", "--out",
                           str(tmp_path), "--report", str(report_path)], input=payload, capture_output=True,
                          timeout=240)
    assert done.returncode == 0, done.stderr.decode()
    report = json.loads(report_path.read_text())
    links = {x["link"]: x for x in report["links"]}
    into_resample, to_wav = links["live.samples -> down.samples"], links["down.samples -> audio.audio"]
    assert into_resample["missing_samples"] > 0                      # the source did drop
    assert into_resample["sent_samples"] + into_resample["missing_samples"] == total
    with wave.open(str(tmp_path / "band.wav")) as w:
        assert w.getnframes() == total // 4
    assert to_wav["missing_samples"] > 0
    assert f"{to_wav['missing_samples']} of them silence" in report["blocks"]["audio"]["report"][0]


def test_a_huge_declared_gap_is_filled_in_bounded_pieces():
    """A chunk claiming 2**27 missing rows (1 GiB of cf32 zeros, as a forged header could): the pieces a
    writer writes add up to the gap and the data, and no piece, nor the peak memory, exceeds 16 MiB."""
    import tracemalloc

    from bandloom.blocks.block import Chunk
    chunk = Chunk(np.ones(10, np.complex64), 1 << 27, discontinuity=True, dropped=1 << 27)
    tracemalloc.start()
    total = 0
    for piece in chunk.filled_pieces():
        total += len(piece)
        assert piece.nbytes <= 16 << 20
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    assert total == (1 << 27) + 10
    assert peak < 32 << 20
