"""The design and bench commands: output for people and scripts, saved taps, errors without tracebacks."""

import json

import numpy as np
import pytest
from bandloom.blocks.dsp import design_bank
from bandloom.runtime.cli import main
from runner import bandloom


def test_design_table_and_json(capsys):
    """The table names the figures; --json gives the same numbers as design_bank."""
    assert main(["design", "--channels", "256", "--oversample", "2"]) == 0
    table = capsys.readouterr().out
    for label in ("adjacent-channel rejection", "passband ripple", "round-trip error", "cost vs bare FFT"):
        assert label in table
    assert main(["design", "--channels", "256", "--json"]) == 0
    figures = json.loads(capsys.readouterr().out)
    assert figures["adjacent_rejection_db"] == design_bank(256).response.adjacent_rejection_db
    assert figures["delay_samples"] == 4096


def test_design_saves_taps_as_npy_and_text(tmp_path, capsys):
    """--taps and --synthesis-taps write the exact taps, .npy as binary and other names as text."""
    assert main(["design", "--channels", "32", "--taps", str(tmp_path / "a.npy"),
                 "--synthesis-taps", str(tmp_path / "s.txt")]) == 0
    design = design_bank(32)
    assert np.array_equal(np.load(tmp_path / "a.npy"), design.analysis_taps)
    assert np.allclose(np.loadtxt(tmp_path / "s.txt"), design.synthesis_taps, rtol=1e-15, atol=0)


@pytest.mark.parametrize("argv,message", [
    (["design", "--channels", "0"], "Parameter channels=0 is not an integer >= 2!"),
    (["design", "--channels", "16", "--oversample", "3"], "Parameter oversample=3 does not divide channels=16!"),
    (["design", "--channels", "16", "--shape", "low-pass", "--rolloff", "0.3"],
     "Parameter rolloff=0.3 applies to shape='root-raised-cosine' only!"),
    (["design", "--channels", "16", "--window", "nonesuch"], "window='nonesuch'"),
    (["design", "--channels", "1" + "0" * 400], "Parameter channels=<a number of 401 digits> is more than 262144!"),
    (["bench", "--channels", "0"], "argument --channels: '0' is not a whole number from 2 to 65536"),
    (["bench", "--chunk", "0"], "argument --chunk: '0' is not a whole number from 1 to 67108864"),
    (["bench", "--samples", "-1"], "argument --samples: '-1' is not a whole number from 1 to 1073741824"),
    (["bench", "--channels", "64", "--oversample", "3"], "no case to measure: M/D must divide M (M/D = 3 for M = 64)"),
    (["roundtrip", "--channels", "16", "--frames", "-3"], "argument --frames: '-3' is not a whole number from 1 to 4096"),
    (["roundtrip", "--channels", "16", "--threshold", "nan"], "argument --threshold: 'nan' is not a number of dB"),
    (["roundtrip", "--channels", "8192", "--frames", "4096"], "--frames 4096 x M = 8192 channels is 33554432, more than "
     "16777216; give at most 2048"),
    (["channel-quality", "--channels", "16", "--steps", "0"], "argument --steps: '0' is not a whole number from 1 to 1024"),
    (["run", "flow.toml", "--drain-time", "-1"], "argument --drain-time: '-1' is not a number of seconds from 0 to 3600"),
])
def test_design_and_bench_errors_are_one_line(argv, message):
    """Bad knobs give 'bandloom COMMAND: error: ...' and exit 2, never a traceback. (bench --channels 0 raised
    ZeroDivisionError, --chunk 0 looped for ever, a 401-digit M met numpy's size error; roundtrip ran with
    -3 frames, judged against a nan threshold, and ran out of memory at 10^12 frames.)"""
    done = bandloom(*argv, timeout=60)
    assert done.returncode == 2
    last = done.stderr.strip().splitlines()[-1]         # (argparse prints its usage lines first)
    assert last.startswith(f"bandloom {argv[0]}: ") and message in last, done.stderr
    assert "Traceback" not in done.stderr


def test_bench_json_reports_ratios_measured_in_the_same_run():
    """bench --json gives throughput and the ratio to a bare FFT for each case (no speed is asserted)."""
    done = bandloom("bench", "--channels", "64", "--taps-per-branch", "4", "--oversample", "1,2",
                    "--samples", "65536", "--repeats", "1", "--json")
    assert done.returncode == 0, done.stderr
    cases = json.loads(done.stdout)
    assert [(c["channels"], c["oversample"]) for c in cases] == [(64, 1), (64, 2)]
    for c in cases:
        assert c["analysis_ratio"] > 0 and c["synthesis_ratio"] > 0 and c["analysis_msps"] > 0
        assert c["model_ratio"] == pytest.approx(1 + 4 / 6)
        assert c["threads"] == 1 and c["thread_speedup"] is None


def test_bench_with_threads_reports_the_speedup_over_one_thread():
    """bench --threads 2 adds, per case, the throughput of both banks with two threads over one (measured in
    the same run; no speed is asserted, only that it was measured)."""
    done = bandloom("bench", "--channels", "256", "--taps-per-branch", "4", "--oversample", "2", "--samples",
                    "524288", "--chunk", "262144", "--repeats", "1", "--threads", "2", "--json")
    assert done.returncode == 0, done.stderr
    (case,) = json.loads(done.stdout)
    assert case["threads"] == 2 and case["thread_speedup"] > 0


def test_version_is_pyprojects_from_the_command_the_module_and_the_package():
    """bandloom --version, python -m bandloom --version and bandloom.__version__ all give pyproject's
    version; the LICENSE file is the licence pyproject names (MIT)."""
    import subprocess
    import sys
    import tomllib
    from pathlib import Path

    import bandloom as package
    root = Path(__file__).parent.parent
    project = tomllib.loads((root / "pyproject.toml").read_text())["project"]
    assert package.__version__ == project["version"]
    for command in ([sys.executable, "-m", "bandloom", "--version"], [sys.executable, "-m", "bandloom.runtime", "--version"]):
        done = subprocess.run(command, capture_output=True, text=True, timeout=60)
        assert (done.returncode, done.stdout.strip()) == (0, f"bandloom {project['version']}"), done.stderr
    assert project["license"] == "MIT" and (root / "LICENSE").read_text().startswith("MIT License")
    assert "LICENSE" in project["license-files"]


def test_scenario_transmitter_keys_are_documented_where_users_look(capsys):
    """Every key the scenario's transmitter parser takes, for every kind, is named by 'bandloom blocks
    scenario' (and so in docs/blocks.md, generated from the same text)."""
    from bandloom.blocks.scenario import _FIELDS, KINDS
    assert main(["blocks", "scenario"]) == 0
    text = capsys.readouterr().out
    for kind in KINDS:
        assert f"- {kind}: " in text
        for key in _FIELDS[kind]:
            assert f"{key} (" in text.split(f"- {kind}: ")[1].splitlines()[0]
    for key in ("kind", "frequency", "level", "on"):
        assert f"{key} (" in text


def terminal_lines(raw: str) -> list[str]:
    """What a terminal shows of ``raw``: each line as left by carriage returns and erase-line sequences."""
    shown = []
    for line in raw.replace("\r\n", "\n").split("\n"):
        shown.append(line.split("\r")[-1].replace("\x1b[K", ""))
    return shown


def on_a_terminal(*args) -> str:
    """Run the bandloom command with stdout and stderr on one pty, as in a shell; everything it wrote."""
    import os
    import subprocess
    import sys
    master, slave = os.openpty()
    process = subprocess.Popen([sys.executable, "-m", "bandloom.runtime", *args], stdout=slave, stderr=slave)
    os.close(slave)
    raw = b""
    while True:
        try:
            data = os.read(master, 4096)
        except OSError:
            break
        if not data:
            break
        raw += data
    os.close(master)
    assert process.wait(timeout=120) in (0, 1)
    return raw.decode()


def test_roundtrip_on_a_terminal_shows_progress_then_clean_results():
    """A long verification says which signal it is on; its report starts on a clean line."""
    raw = on_a_terminal("roundtrip", "--channels", "16", "--signals", "noise,tone")
    assert "roundtrip: noise (1 of 2)" in raw and "roundtrip: tone (2 of 2)" in raw
    assert any(line.startswith("round trip of design M=16") for line in terminal_lines(raw))


def test_bench_on_a_terminal_clears_its_progress_line_before_the_table():
    """bench on a terminal (stdout and stderr one pty, as in a shell): the table's header stands on a line of
    its own, not after the last progress message."""
    raw = on_a_terminal("bench", "--channels", "64", "--taps-per-branch", "4", "--oversample", "1", "--samples",
                        "65536", "--repeats", "1")
    lines = terminal_lines(raw)
    header = next(line for line in lines if "analysis Msamples/s" in line)
    assert header.split() == ["M", "R", "M/D", "analysis", "Msamples/s", "analysis", "/", "FFT", "synthesis",
                              "Msamples/s", "synthesis", "/", "IFFT", "model", "1+R/log2", "M"]


def test_numbers_for_people_never_read_like_6_355e05_or_minus_zero():
    """Tables print large rates with SI prefixes, and a value that rounds to zero as 0."""
    from bandloom.blocks.text_tables import format_value, render_pairs
    assert format_value(635_500.0) == "635.5 k" and format_value(-0.00001) == "-10 µ"
    assert format_value(-0.00004) != "-0.0000" and format_value(-0.0) == "0"
    assert render_pairs([("rate", 2.4e6, "Hz")]) == "rate  2.4 MHz"
