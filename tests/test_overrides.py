"""--set BLOCK.KEY=VALUE on run and check: the value is checked like the file's, and problems name the override."""

import numpy as np
from runner import bandloom, run_flow

FLOW = '''[blocks.rx]
type = "iq-reader"
path = "not-this-one.cf32"
sample_rate = "1 MHz"

[blocks.keep]
type = "iq-writer"
path = "copy.sigmf-data"

[[links]]
from = "rx.samples"
to = "keep.samples"
'''


def setup(tmp_path):
    (tmp_path / "flows").mkdir()
    flow = tmp_path / "flows" / "record.toml"
    flow.write_text(FLOW)
    (tmp_path / "captures").mkdir()
    data = (np.arange(5000) * (1 - 1j)).astype(np.complex64)
    data.tofile(tmp_path / "captures" / "today.cf32")
    return flow, data


def test_a_recording_and_its_rate_given_on_the_command_line(tmp_path):
    """--set rx.path (relative to the current folder, not the flow's) and --set 'rx.sample_rate=2.4 MHz' (text
    with a unit): the copy holds the recording and its metadata the overridden rate (SigMF core:sample_rate)."""
    import json
    flow, data = setup(tmp_path)
    done, report = run_flow(flow, tmp_path / "out", "--set", "rx.path=captures/today.cf32",
                            "--set", "rx.sample_rate=2.4 MHz", cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    assert np.array_equal(np.fromfile(tmp_path / "out" / "copy.sigmf-data", np.complex64), data)
    meta = json.loads((tmp_path / "out" / "copy.sigmf-meta").read_text())
    assert meta["global"]["core:sample_rate"] == 2.4e6
    assert report["lost_samples"] == 0


def test_a_bad_override_is_refused_naming_the_override(tmp_path):
    """A value that fails the parameter's rule, an unknown key and an unknown block: each one line that starts
    with the --set it came from; nothing runs."""
    flow, _ = setup(tmp_path)
    done = bandloom("check", flow, "--set", "rx.path=captures/today.cf32", "--set", "rx.sample_rate=nan",
                    "--set", "rx.speed=3", cwd=tmp_path)
    assert done.returncode == 1
    lines = done.stderr.splitlines()
    assert "--set rx.sample_rate=nan: blocks.rx.sample_rate: expected a finite number in Hz, got nan" in lines
    assert any(line.startswith("--set rx.speed=3: blocks.rx.speed: iq-reader has no parameter 'speed'")
               for line in lines)
    done = bandloom("check", flow, "--set", "radio.path=x", cwd=tmp_path)
    assert done.returncode == 1
    assert "--set radio.path=x: the flow" in done.stderr and "has no block 'radio' (its blocks: keep, rx)" in done.stderr


def test_an_override_without_a_key_is_a_usage_error(tmp_path):
    """--set without BLOCK.KEY=VALUE: exit 2 and the form that would be right."""
    flow, _ = setup(tmp_path)
    done = bandloom("run", flow, "--set", "sample_rate", cwd=tmp_path)
    assert done.returncode == 2
    assert "expected BLOCK.KEY=VALUE (for example --set 'rx.sample_rate=10 MHz')" in done.stderr
    assert "Traceback" not in done.stderr


def test_an_override_with_a_huge_number_gets_the_flow_files_limit_not_a_traceback(tmp_path):
    """A 400-digit number given with --set (a flow file refuses it by its text; a --set value reached the
    parameter checks and overflowed converting it to a float): exit 2, the override and the limit named."""
    flow, _ = setup(tmp_path)
    for value in ("1" + "0" * 400, "[" * 100 + "]" * 100):
        done = bandloom("check", flow, "--set", f"rx.sample_rate={value}", cwd=tmp_path)
        assert done.returncode == 2, done.stderr
        assert "Traceback" not in done.stderr
        assert "a number of more than 64 digits" in done.stderr or "nested more than" in done.stderr
