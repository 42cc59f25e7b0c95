"""bandloom check: every bad flow in tests/bad_flows gives exactly its expected error text, never a traceback."""

from pathlib import Path

import pytest
from bandloom.runtime.cli import main
from runner import bandloom

BAD_FLOWS = Path(__file__).parent / "bad_flows"
CASES = sorted(p.stem for p in BAD_FLOWS.glob("*.toml"))


def test_there_are_at_least_25_bad_flows():
    """The suite keeps a broad set of broken flows, each with its expected text beside it."""
    assert len(CASES) >= 25
    assert all((BAD_FLOWS / f"{name}.expected").exists() for name in CASES)


@pytest.mark.parametrize("name", CASES)
def test_bad_flow_gives_its_exact_error_text(name, monkeypatch, capsys):
    """check exits 1 and prints exactly the expected problems (file, line, key path, what would be right)."""
    monkeypatch.chdir(BAD_FLOWS)
    status = main(["check", f"{name}.toml"])
    captured = capsys.readouterr()
    assert status == 1
    assert captured.out == ""
    assert captured.err == (BAD_FLOWS / f"{name}.expected").read_text()


def test_bad_flows_print_no_traceback_from_the_real_command():
    """Run as a user would (a separate process), a broken flow gives the one-line error and exit 1."""
    for name in ["syntax-unclosed-string", "several-problems-at-once", "cycle", "file-not-whole-samples"]:
        done = bandloom("check", f"{name}.toml", cwd=BAD_FLOWS)
        assert done.returncode == 1
        assert "Traceback" not in done.stderr
        assert done.stderr == (BAD_FLOWS / f"{name}.expected").read_text()


def test_good_flow_checks_and_describes_its_streams(tmp_path, monkeypatch, capsys):
    """A correct flow passes check and lists each output's rate and centre."""
    import numpy as np
    np.zeros(4096, np.complex64).tofile(tmp_path / "in.cf32")
    (tmp_path / "ok.toml").write_text(
        '[blocks.src]\ntype = "iq-reader"\npath = "in.cf32"\nsample_rate = "2.4 MHz"\ncentre_frequency = "100 MHz"\n'
        '[blocks.split]\ntype = "channelizer"\nchannels = 8\n'
        '[blocks.rec]\ntype = "iq-writer"\npath = "c{channel}.cf32"\n'
        'per_channel = { from = "split.channels", select = ["100.3 MHz", 7] }\n'
        '[[links]]\nfrom = "src.samples"\nto = "split.samples"\n')
    monkeypatch.chdir(tmp_path)
    assert main(["check", "ok.toml"]) == 0
    out = capsys.readouterr().out
    assert "ok.toml: ok: 4 block processes, 3 links" in out
    assert "split.channels: 8 channels at 600.0 kHz each, spaced 300.0 kHz" in out


def test_block_reference_is_up_to_date(capsys):
    """docs/blocks.md is what 'bandloom blocks --markdown' prints for bandloom's own blocks."""
    assert main(["blocks", "--markdown"]) == 0
    reference = Path(__file__).parent.parent / "docs" / "blocks.md"
    assert capsys.readouterr().out == reference.read_text()
