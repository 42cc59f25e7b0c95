"""bandloom bench --flow: a real flow run at two lengths, its figures held to what the flow must move."""

import json
import socket

from bandloom.runtime import shared_rings
from runner import bandloom

FLOW = """
[blocks.band]
type = "scenario"
sample_rate = "4 MHz"
duration = "1 s"
noise = "-40 dBFS"

[blocks.split]
type = "channelizer"
channels = 16
oversample = 2

[blocks.sink]
type = "discard"

[[links]]
from = "band.samples"
to = "split.samples"

[[links]]
from = "split.channels"
to = "sink.samples"
"""


def test_bench_flow_measures_both_lengths_and_what_each_link_carries(tmp_path):
    """Two runs (1 s and 10 s of a 4 MHz scenario): the input counts are exact, the steady rate and the
    in-process ratio are positive numbers, start-up is shorter than the run, and the bytes per input sample
    are what the flow must move: 8 for cf32 samples; a channelizer at M/D = 2 emits 2 complex values per input
    sample, 16 bytes (design.md section 3: M channels every D samples). The long run is ten times the short
    one so that its extra work (about a second) outweighs how much start-up varies on a busy machine (with
    four times, the long run once took no longer than the short one in a full test run)."""
    flow = tmp_path / "bench.toml"
    flow.write_text(FLOW)
    done = bandloom("bench", "--flow", flow, "--runs", "1", "--lengthen", "10", "--json")
    assert done.returncode == 0, done.stderr
    result = json.loads(done.stdout)
    assert result["short"]["input_samples"] == 4_000_000 and result["long"]["input_samples"] == 40_000_000
    assert result["steady_input_rate"] > 0
    assert 0 < result["short"]["startup_seconds"] < result["short"]["seconds"], result["short"]
    assert result["in_process"]["split"]["rate"] > 0 and result["in_process"]["split"]["ratio"] > 0
    links = {x["link"]: x for x in result["links"]}
    assert links["band.samples -> split.samples"]["bytes_per_input_sample"] == 8
    assert links["split.channels -> sink.samples"]["bytes_per_input_sample"] == 16
    # Every message goes through the link's shared memory, and the channelizer makes each chunk's frames in
    # room the link lends it in the ring: no copy. (Each chunk fills at least a 256 KiB batch of 2,048
    # frames of 16 channels, the source's last one too: 40,000,000 mod 65,536 = 22,528 samples, 2,816 frames.)
    wide = links["split.channels -> sink.samples"]
    if shared_rings.SUPPORTED:
        assert wide["shared_memory_fraction"] == 1.0, result["links"]
        assert wide["copied_bytes_per_input_sample"] == 0, result["links"]
    busy = {b["block"]: b["busy_fraction"] for b in result["blocks"]}
    assert 0 < busy["split"] <= 1.0, result["blocks"]
    cpu = {b["block"]: b["cpu_ns_per_input_sample"] for b in result["blocks"]}
    assert cpu["split"] > 0 and cpu["band"] > 0


def test_bench_flow_refuses_a_source_whose_length_it_cannot_set(tmp_path):
    """A live source has no length to scale: the refusal names the block and what would do, in one line."""
    flow = tmp_path / "live.toml"
    flow.write_text('[blocks.rx]\ntype = "stdin-reader"\nsample_rate = 1000\n'
                    '[blocks.sink]\ntype = "discard"\n[[links]]\nfrom = "rx.samples"\nto = "sink.samples"\n')
    done = bandloom("bench", "--flow", flow, "--runs", "1")
    assert done.returncode == 2
    assert "block 'rx' (stdin-reader) has no parameter that sets its length" in done.stderr
    assert "Traceback" not in done.stderr


def test_bench_flow_says_so_when_the_flow_fails(tmp_path):
    """A flow that fails when run (its endpoint's port is taken by another program) is reported with the end
    of its own error output and exit 1, not a traceback."""
    with socket.socket() as taken:
        taken.bind(("127.0.0.1", 0))
        taken.listen()
        flow = tmp_path / "failing.toml"
        flow.write_text('[blocks.band]\ntype = "scenario"\nsample_rate = 1000\nduration = 1\n'
                        f'[[links]]\nfrom = "band.samples"\nendpoint = "tcp://127.0.0.1:{taken.getsockname()[1]}"\n')
        done = bandloom("bench", "--flow", flow, "--runs", "1")
    assert done.returncode == 1, done.stderr
    assert "bandloom bench: the flow did not run cleanly (exit status 1)" in done.stderr
    assert "Address already in use" in done.stderr and "Traceback" not in done.stderr
