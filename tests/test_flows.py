"""Every flow in flows/ passes check and runs to completion; the main demo's results are what its scenario holds."""

import csv
import json
import tomllib
import wave
from pathlib import Path

import numpy as np
import pytest
from bandloom.blocks.block import BlockContext
from bandloom.blocks.dsp import design_bank
from bandloom.blocks.scenario import Scenario
from bandloom.runtime import shared_rings
from bandloom.runtime.plugins import load_registry
from runner import bandloom, run_flow

FLOWS = Path(__file__).parent.parent / "flows"
ALL = sorted(p.name for p in FLOWS.glob("*.toml"))
REGISTRY = load_registry()


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    """Run each flow once for the module: name -> (completed process, report, output folder)."""
    cache = {}

    def get(name):
        if name not in cache:
            out = tmp_path_factory.mktemp(name.replace(".toml", ""))
            path, extra = placed_flow(name, tmp_path_factory)
            done, report = run_flow(path, out, *extra)
            cache[name] = (done, report, out)
        return cache[name]
    return get


def placed_flow(name, tmp_path_factory):
    """(path, run options) of an example flow. One placed on hosts runs here with --one-machine, from a copy
    beside a key folder of its own (key folders are made where they are used, never kept in the repository)."""
    text = (FLOWS / name).read_text()
    if "[hosts." not in text:
        return FLOWS / name, ()
    folder = tmp_path_factory.mktemp("placed")
    (folder / name).write_text(text)
    keys = tomllib.loads(text)["flow"]["keys"]
    assert bandloom("keys", folder / keys).returncode == 0
    return folder / name, ("--one-machine",)


@pytest.mark.parametrize("name", ALL)
def test_flow_checks_and_runs(name, runs, tmp_path_factory):
    """bandloom check accepts the flow, and bandloom run finishes it with every block done and nothing lost."""
    check = bandloom("check", placed_flow(name, tmp_path_factory)[0])
    assert check.returncode == 0, check.stderr
    done, report, _ = runs(name)
    assert done.returncode == 0, done.stderr
    assert "Traceback" not in done.stderr
    assert report["outcome"] == "finished"
    assert all(b["state"] == "done" for b in report["blocks"].values())
    for link in report["links"]:
        assert link["dropped_samples"] == 0 and link["missing_samples"] == 0
        if link["received_samples"] is not None:
            assert link["received_samples"] == link["sent_samples"]


def test_every_flow_says_what_it_shows():
    """Each example flow starts with a comment saying what it shows."""
    for name in ALL:
        assert (FLOWS / name).read_text().startswith("# "), name


MAIN = "harbour-exercise.toml"
# The scenario's transmitters, by channel of the 32-channel grid (FFT order, 25 kHz spacing around 160.5 MHz).
EXPECTED_CHANNELS = {2: "fm voice", 5: "fm tone", 9: "am", 23: "fsk", 29: "strong cw", 28: "weak cw",
                     13: "interferer", 14: "interferer", 15: "interferer"}


def activity_rows(out):
    with open(out / "activity.csv") as handle:
        return list(csv.DictReader(handle))


def test_main_demo_activity_finds_exactly_the_transmitters(runs):
    """The activity log names exactly the channels the scenario keys, no more, with on/off times that match."""
    _, _, out = runs(MAIN)
    rows = activity_rows(out)
    assert {int(r["channel"]) for r in rows} == set(EXPECTED_CHANNELS)
    fm_voice = [r for r in rows if r["channel"] == "2"]
    assert [r["event"] for r in fm_voice] == ["on", "off"]
    assert float(fm_voice[0]["time_s"]) == pytest.approx(0.30, abs=0.06)
    assert float(fm_voice[1]["time_s"]) == pytest.approx(1.90, abs=0.06)
    fsk = [r for r in rows if r["channel"] == "23"]
    assert [r["event"] for r in fsk] == ["on", "off"] * 3


def test_main_demo_weak_carrier_level(runs):
    """The -80 dBFS carrier one channel from a -20 dBFS one is reported at its level within 1 dB."""
    _, _, out = runs(MAIN)
    weak = [r for r in activity_rows(out) if r["channel"] == "28"]
    assert weak and weak[0]["event"] == "on"
    assert float(weak[0]["level_dbfs"]) == pytest.approx(-80.0, abs=1.0)
    assert float(weak[0]["frequency_hz"]) == pytest.approx(160.400e6)


def scenario_band(transmitters, seconds=0.5):
    params = {p.name: p.default for p in Scenario.parameters if not p.required}
    params.update(sample_rate=800e3, centre_frequency=160.5e6, duration=seconds, noise=-80.0,
                  transmitters=transmitters, seed=9)
    block = Scenario(params, BlockContext("band", Path("x.toml"), Path(".")))
    block.output_streams({})
    block.start({})
    block.begin()
    parts = []
    while (p := block.produce()) is not None:
        parts.append(p["samples"][0].data)
    return np.concatenate(parts)


@pytest.mark.parametrize("shape,effect_limit_db", [("root-raised-cosine", 0.1), ("rectangle", None)])
def test_weak_carrier_is_unaffected_by_its_strong_neighbour(shape, effect_limit_db):
    """With the default design a 60 dB stronger neighbour changes the weak channel's level by < 0.1 dB;
    a plain FFT bank (rectangle window) is swamped by the neighbour's leakage."""
    weak = {"kind": "cw", "frequency": "160.400 MHz", "level": "-80 dBFS"}
    strong = {"kind": "cw", "frequency": "160.4245 MHz", "level": "-20 dBFS"}   # off-centre: worst for leakage
    levels = []
    for transmitters in ([weak], [weak, strong]):
        x = scenario_band(transmitters)
        design = design_bank(32, oversample=2) if shape != "rectangle" else design_bank(32, oversample=1, shape=shape)
        frames = design.analysis_bank().process(x)[100:]
        levels.append(10 * np.log10(np.mean(np.abs(frames[:, 28]) ** 2)))
    if effect_limit_db is not None:
        assert abs(levels[1] - levels[0]) < effect_limit_db
        assert levels[0] == pytest.approx(-80.0, abs=0.5)
    else:
        assert levels[1] - levels[0] > 20.0


def test_main_demo_outputs(runs):
    """IQ files with SigMF metadata per active channel, 48 kHz WAV for the two FM channels, and the waterfall."""
    import jsonschema
    import sigmf
    _, _, out = runs(MAIN)
    schema = json.loads((Path(sigmf.__file__).parent / "schema-meta.json").read_text())
    metas = sorted((out / "iq").glob("*.sigmf-meta"))
    assert len(metas) == 9
    for meta_path in metas:
        meta = json.loads(meta_path.read_text())
        jsonschema.validate(meta, schema)
        assert meta["global"]["core:sample_rate"] == 50e3
        assert meta_path.with_suffix(".sigmf-data").stat().st_size == 150_000 * 8
    for name in ("160.5500MHz.wav", "160.6250MHz.wav"):
        with wave.open(str(out / "audio" / name)) as w:
            assert (w.getframerate(), w.getnchannels(), w.getnframes()) == (48000, 1, 144000)
    with wave.open(str(out / "audio" / "160.6250MHz.wav")) as w:
        audio = np.frombuffer(w.readframes(w.getnframes()), "<i2").astype(float)
    during = audio[int(1.5 * 48000):int(2.5 * 48000)]
    spectrum = np.abs(np.fft.rfft(during))
    assert np.fft.rfftfreq(len(during), 1 / 48000)[np.argmax(spectrum)] == pytest.approx(1000, abs=2)
    assert (out / "waterfall.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_round_trip_flow_passes(runs):
    """The round-trip flow's comparison reports PASS below -110 dB with the design's delay."""
    _, report, out = runs("round-trip.toml")
    figures = json.loads((out / "round-trip.json").read_text())
    assert figures["pass"] and figures["error_db"] <= -110
    assert figures["delay_samples"] == design_bank(64).delay


def test_channel_to_stdout_pipes_only_data(runs):
    """stdout carries exactly the raw 16-bit audio (48000 samples of a 1 kHz tone); the summary went to stderr."""
    done, _, _ = runs("channel-to-stdout.toml")
    audio = np.frombuffer(done.stdout, "<i2")
    assert len(audio) == 48000
    spectrum = np.abs(np.fft.rfft(audio[4800:].astype(float)))
    assert np.fft.rfftfreq(len(audio) - 4800, 1 / 48000)[np.argmax(spectrum)] == pytest.approx(1000, abs=2)
    assert done.stderr == "bandloom: verdict: no sample lost\n"      # --quiet: only the verdict, on stderr


def test_main_demo_audio_has_no_click_and_no_clipping(runs):
    """The two FM WAVs: silence in the first 10 ms (no start-up click: peak below -40 dBFS), no value clipped
    anywhere (the squelch closes before the discriminator's noise after a carrier stops), exactly 3 s long at
    48 kHz, and sound only while the transmitter is keyed (0.30-1.90 s and 1.20-2.80 s, within 10 ms)."""
    import wave
    _, _, out = runs(MAIN)
    for name, (on, off) in (("160.5500MHz.wav", (0.30, 1.90)), ("160.6250MHz.wav", (1.20, 2.80))):
        with wave.open(str(out / "audio" / name)) as w:
            rate, frames = w.getframerate(), w.getnframes()
            x = np.frombuffer(w.readframes(frames), "<i2").astype(float) / 32768
        assert (rate, frames) == (48000, 3 * 48000)
        assert np.abs(x[:480]).max() < 0.01
        assert np.count_nonzero(np.abs(x) >= 32767 / 32768) == 0
        sounding = np.nonzero(np.abs(x) > 1e-4)[0] / rate
        assert sounding[0] == pytest.approx(on, abs=0.01) and sounding[-1] == pytest.approx(off, abs=0.01)


@pytest.mark.parametrize("name", ["wide.toml", "fan-out.toml", "fan-out-discard.toml"])
def test_benchmark_flows_check_and_run_on_the_noise_their_script_makes(name, tmp_path):
    """flows/bench (docs/performance.md's flows): from a copy, make-noise.py writes the 8 Mi-sample input,
    the flow passes check, and a short run of it finishes with every sample delivered."""
    import shutil
    import subprocess
    import sys
    folder = tmp_path / "bench"
    shutil.copytree(FLOWS / "bench", folder, ignore=shutil.ignore_patterns("noise.cf32"))
    made = subprocess.run([sys.executable, folder / "make-noise.py"], capture_output=True, text=True, timeout=120)
    assert made.returncode == 0, made.stderr
    assert (folder / "noise.cf32").stat().st_size == 8 * 1024 * 1024 * 8          # 8 Mi cf32 samples
    assert (FLOWS / "bench" / name).read_text().startswith("# ")
    check = bandloom("check", folder / name)
    assert check.returncode == 0, check.stderr
    done, report = run_flow(folder / name, tmp_path / "out", "--set", "capture.duration=0.05 s",
                            "--set", "capture.repeat=1")
    assert done.returncode == 0, done.stderr
    assert report["outcome"] == "finished"
    assert all(b["state"] == "done" for b in report["blocks"].values())
    for link in report["links"]:
        assert link["dropped_samples"] == 0 and link["missing_samples"] == 0
        assert link["received_samples"] in (None, link["sent_samples"])
    rate = 61.44e6 if name == "wide.toml" else 6.4e6
    assert report["links"][0]["sent_samples"] == round(0.05 * rate)     # the reader's 0.05 s, all sent
    if name == "wide.toml" and shared_rings.SUPPORTED:
        # the reader reads the file, and the channelizer makes its frames, in room their links lend them
        # in shared memory: every chunk (the last one's 57,344 samples too) fills at least a batch
        assert all(link["shared_memory_messages"] == link["sent_messages"] for link in report["links"])
        assert [link["copied_bytes"] for link in report["links"]] == [0, 0]
