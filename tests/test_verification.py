"""roundtrip and channel-quality: measured with test signals, checked against the figures computed from the taps."""

import json

import numpy as np
import pytest
from bandloom.blocks.dsp import design_bank
from bandloom.blocks.dsp.verification import measure_channel_response, probe_signal, round_trip_in_process
from bandloom.runtime.cli import main
from runner import bandloom

FLOWS = __import__("pathlib").Path(__file__).parent.parent / "flows"


def run_json(capsys, *argv):
    status = main(list(argv) + ["--json"])
    return status, json.loads(capsys.readouterr().out)


def test_roundtrip_of_default_design_passes(capsys):
    """Noise, comb, chirp and tone come back below -110 dB with the design's delay, unit gain and zero phase."""
    status, report = run_json(capsys, "roundtrip", "--channels", "32")
    assert status == 0 and report["pass"]
    for s in report["signals"]:
        assert s["error_db"] <= -110 and s["delay_samples"] == report["design_delay"]
        assert abs(s["gain_db"]) < 1e-4 and abs(s["phase_degrees"]) < 1e-3
    tone = next(s for s in report["signals"] if s["signal"] == "tone")
    assert tone["alias_image_level_db"] <= -110


def test_roundtrip_of_critically_sampled_design_fails_and_says_why(capsys):
    """A critically sampled low-pass bank fails the threshold (exit 1) and shows its aliases."""
    status, report = run_json(capsys, "roundtrip", "--channels", "32", "--oversample", "1")
    assert status == 1 and not report["pass"]
    tone = next(s for s in report["signals"] if s["signal"] == "tone")
    assert tone["alias_image_level_db"] > -60


def test_roundtrip_error_matches_the_design_prediction():
    """The measured white-noise error is within 2 dB of the exact float64 prediction from the taps."""
    design = design_bank(128)
    noise = round_trip_in_process(design, ["noise"])[0]
    assert noise.error_db == pytest.approx(design.round_trip_error_db, abs=2.0)


def test_roundtrip_through_real_processes_equals_in_process():
    """roundtrip --flow runs channelizer and synthesis as separate processes; errors within 1 dB of in-process."""
    done = bandloom("roundtrip", "--flow", FLOWS / "round-trip.toml", "--json", timeout=300)
    assert done.returncode == 0, done.stderr
    through = json.loads(done.stdout)
    assert "block processes" in through["where"]
    assert int(through["where"].split()[1]) == 16
    local = bandloom("roundtrip", "--channels", "64", "--json")
    in_process = json.loads(local.stdout)
    for a, b in zip(through["signals"], in_process["signals"]):
        assert a["signal"] == b["signal"]
        assert a["error_db"] == pytest.approx(b["error_db"], abs=1.0)


@pytest.mark.parametrize("channels,oversample,shape", [(16, 2, None), (64, 4, None), (32, 1, None),
                                                       (32, 2, "low-pass")])
def test_measured_channel_figures_agree_with_the_taps(channels, oversample, shape, capsys):
    """Tone-measured ripple, edge, scalloping, rejections, alias rejection and ENBW agree with the taps within 1 dB."""
    argv = ["channel-quality", "--channels", str(channels), "--oversample", str(oversample)]
    if shape:
        argv += ["--shape", shape]
    status, report = run_json(capsys, *argv)
    assert status == 0
    for row in report["figures"]:
        if row["figure"] == "enbw_bins":
            assert row["measured"] == pytest.approx(row["from_taps"], rel=0.03)
        else:
            assert abs(row["difference"]) <= 1.0, row


def test_tone_measurement_sees_a_plain_fft_bank_leak():
    """Measured with tones, a rectangular (plain FFT) channel shows its -13 dB sidelobes and 3.9 dB scalloping."""
    design = design_bank(64, oversample=1, shape="rectangle")
    figures = measure_channel_response(design.analysis_bank, 64, steps_per_spacing=64).figures(0.25)
    assert figures["scalloping_loss_db"] == pytest.approx(3.92, abs=0.05)      # common practice, (2/pi)^2
    assert figures["adjacent_rejection_db"] < 14


def test_probe_signals_are_what_they_say():
    """The comb's tones sit at every channel centre, edge and quarter point; all signals have unit RMS."""
    M, n = 8, 8192
    comb = probe_signal("comb", n, M)
    spectrum = np.abs(np.fft.fft(comb)) ** 2
    from bandloom.blocks.dsp.verification import comb_frequencies
    peaks = set(np.argsort(spectrum)[-3 * M:].tolist())
    expected = set((np.round(comb_frequencies(M) * n).astype(int) % n).tolist())
    assert len(expected) == 3 * M and peaks == expected      # centres, edges and quarter points
    assert spectrum[sorted(expected)].min() > 1e6 * np.median(spectrum)
    for name in ("noise", "comb", "chirp", "tone"):
        assert np.mean(np.abs(probe_signal(name, n, M)) ** 2) == pytest.approx(1.0, rel=0.05)


def test_pictures_are_drawn(tmp_path):
    """design --plot, roundtrip --plot and channel-quality --plot write PNG files."""
    for argv in (["design", "--channels", "32", "--plot", tmp_path / "d.png"],
                 ["roundtrip", "--channels", "32", "--plot", tmp_path / "r.png"],
                 ["channel-quality", "--channels", "32", "--plot", tmp_path / "q.png"]):
        assert main([str(a) for a in argv]) in (0, 1)
    for name in ("d.png", "r.png", "q.png"):
        assert (tmp_path / name).read_bytes()[:4] == b"\x89PNG"


def test_roundtrip_needs_a_design_or_a_flow(capsys):
    """Without --channels or --flow the command says what it needs (exit 2, no traceback)."""
    assert main(["roundtrip"]) == 2
    assert "give --channels (with design knobs) or --flow FLOW" in capsys.readouterr().err


def test_guide_taps_table_is_what_design_prints():
    """Every row of the taps-per-branch table in docs/choosing-a-bank.md is reproduced by design_bank."""
    import re
    guide = (FLOWS.parent / "docs" / "choosing-a-bank.md").read_text()
    rows = re.findall(r"^\| (\d+) \| (\d) \| (\d+)(?: \(default\))? \| ([\d.]+) dB \| ([\d.]+) dB \| (-[\d.]+) dB \|$",
                      guide, re.M)
    assert len(rows) == 8
    for r, margin, stopband, rejection, ripple, trip in rows:
        design = design_bank(64, taps_per_branch=int(r), tight_margin=int(margin), stopband_db=float(stopband))
        assert design.response.adjacent_rejection_db == pytest.approx(float(rejection), abs=0.05)
        assert design.response.passband_ripple_db == pytest.approx(float(ripple), abs=0.0005)
        assert design.round_trip_error_db == pytest.approx(float(trip), abs=0.05)


def test_compare_block_finds_an_unknown_delay(tmp_path):
    """Without a design delay the compare block finds the lag by cross-correlation and measures a clean copy."""
    from bandloom.blocks.block import BlockContext, Chunk, StreamInfo
    from bandloom.blocks.compare import Compare
    rng = np.random.default_rng(3)
    x = (rng.standard_normal(100_000) + 1j * rng.standard_normal(100_000)).astype(np.complex64)
    y = (0.5j * np.concatenate([np.zeros(777, np.complex64), x])[:100_000]).astype(np.complex64)
    block = Compare({p.name: p.default for p in Compare.parameters}, BlockContext("c", tmp_path / "f.toml", tmp_path))
    stream = StreamInfo("samples", "cf32", 1e6)
    block.output_streams({"reference": stream, "test": stream})
    block.start({"reference": stream, "test": stream})
    for start in range(0, 100_000, 7000):
        block.consume("reference", Chunk(x[start:start + 7000], start))
        block.consume("test", Chunk(y[start:start + 7000], start))
    block.finish()
    figures = block.figures()
    assert figures["delay_samples"] == 777 and figures["delay_found_by"] == "cross-correlation"
    assert figures["gain_db"] == pytest.approx(20 * np.log10(0.5), abs=1e-4)
    assert figures["phase_degrees"] == pytest.approx(90, abs=1e-3)
    assert figures["error_after_gain_and_phase_db"] < -120 and not figures["pass"]


def test_roundtrip_of_a_flow_that_merges_a_few_channels_tests_those_channels(tmp_path):
    """A flow linking channels 3..6 of 16 to its synthesis: roundtrip --flow runs exactly those through the
    processes and judges the channels between the outer two (4 and 5), where a group reconstructs exactly;
    they meet -100 dB. The merged group's outer halves and the channels left out do not (about 0 dB), which
    is why they are not judged."""
    text = (FLOWS / "round-trip.toml").read_text().replace("channels = 64", "channels = 16")
    text = text.replace('from = "split.channels"\nto = "merge.channels"',
                        'from = "split.channels"\nto = "merge.channels"\nselect = "3..6"')
    assert 'select = "3..6"' in text
    flow = tmp_path / "narrow.toml"
    flow.write_text(text)
    done = bandloom("roundtrip", "--flow", flow, "--json", "--signals", "noise,comb", timeout=300)
    assert done.returncode == 0, done.stderr
    report = json.loads(done.stdout)
    assert report["channels_merged"] == [3, 4, 5, 6] and report["channels_judged"] == [4, 5]
    assert report["pass"]
    for signal in report["signals"]:
        assert signal["error_db"] <= -100
        assert max(signal["band_error_db"][c] for c in (4, 5)) == signal["error_db"]
        assert min(signal["band_error_db"][c] for c in (0, 1, 9, 12)) > -20      # not merged: not reconstructed
        assert signal["whole_band_error_db"] > -20
