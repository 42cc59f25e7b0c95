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


def _per_channel_flow(select):
    return {"blocks": {"src": {"type": "scenario", "sample_rate": "1.6 MHz", "centre_frequency": "100 MHz",
                               "duration": "0.1 s"},
                       "split": {"type": "channelizer", "channels": 16},
                       "keep": {"type": "discard", "per_channel": {"from": "split.channels", "select": select}}},
            "links": [{"from": "src.samples", "to": "split.samples"}]}


def test_signed_channel_numbers_and_frequency_ranges_pick_the_channels_numpy_fftfreq_says():
    """Channel k is centred k * rate / M in FFT order (numpy.fft.fftfreq gives the order): "-2..2" is the five
    channels around the centre, -1 is channel M-1, and a frequency range takes every channel whose centre lies
    inside it, lowest first."""
    import numpy as np
    from bandloom.runtime.flow import check_flow
    from bandloom.runtime.plugins import load_registry
    registry = load_registry()
    centres = 100e6 + np.fft.fftfreq(16) * 1.6e6            # channel k's centre, FFT order

    def picked(select):
        flow = check_flow(_per_channel_flow(select), registry, path="sel.toml")
        return [inst.placeholders["channel"] for inst in flow.instances.values() if inst.declared == "keep"]

    assert picked("-2..2") == [14, 15, 0, 1, 2]
    assert picked(-1) == [15]
    inside = [int(k) for k in np.argsort(centres) if 99.75e6 <= centres[k] <= 100.25e6]
    assert picked("99.75 MHz..100.25 MHz") == inside == [14, 15, 0, 1, 2]


def test_rest_takes_every_channel_no_other_link_takes():
    """select = "rest": the channels of the output that no other link or per-channel rule takes (here the 16
    channels less 0..3 and the link's 14, 15); a second "rest" on one output, or nothing left, is a problem."""
    from bandloom.runtime.flow import FlowErrors, check_flow
    from bandloom.runtime.plugins import load_registry
    registry = load_registry()
    flow = _per_channel_flow("0..3")
    flow["blocks"]["others"] = {"type": "discard", "per_channel": {"from": "split.channels", "select": "rest"}}
    flow["blocks"]["pair"] = {"type": "discard"}
    flow["links"].append({"from": "split.channels", "select": [14, 15], "to": "pair.samples"})
    made = check_flow(flow, registry, path="rest.toml")
    rest = sorted(i.placeholders["channel"] for i in made.instances.values() if i.declared == "others")
    assert rest == list(range(4, 14))
    flow["blocks"]["keep"]["per_channel"]["select"] = "rest"
    with pytest.raises(FlowErrors, match='takes "rest" of split.channels too; only one may'):
        check_flow(flow, registry, path="rest.toml")
    flow["blocks"]["keep"]["per_channel"]["select"] = "all"
    with pytest.raises(FlowErrors, match='no channel of split.channels is left for "rest"'):
        check_flow(flow, registry, path="rest.toml")
