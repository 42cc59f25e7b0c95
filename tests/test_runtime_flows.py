"""Flows run for real: one OS process per block, ZeroMQ links, files compared with the in-process banks."""

import os
import socket
import subprocess
import sys
import textwrap
import time

import msgpack
import numpy as np
import pytest
import zmq
from bandloom.blocks.dsp import design_bank
from conftest import complex_noise
from runner import bandloom, run_flow, worker_processes

RATE = 1.6e6
CENTRE = 156.0e6
M = 16


@pytest.fixture
def recording(tmp_path, rng):
    """A cf32 recording written with plain numpy: noise plus tones in channels 2 and 13."""
    n = 120_000
    m = np.arange(n)
    x = 0.05 * complex_noise(rng, n)
    x += 0.5 * np.exp(2j * np.pi * (2 / M + 0.01) * m) + 0.2 * np.exp(2j * np.pi * (-3 / M) * m)
    x = x.astype(np.complex64)
    x.tofile(tmp_path / "band.cf32")
    return x


def reference_channels(x, oversample=2):
    design = design_bank(M, oversample=oversample)
    return design.analysis_bank().process(x), design


def write_flow(tmp_path, body):
    path = tmp_path / "flow.toml"
    path.write_text(textwrap.dedent(body))
    return path


SOURCE = """
[blocks.source]
type = "iq-reader"
path = "band.cf32"
sample_rate = "1.6 MHz"
centre_frequency = "156 MHz"
chunk_size = 7000
"""


def writers_flow(tmp_path, path, select):
    """The test recording channelized into 16 channels, the selected ones each to its own writer process."""
    return write_flow(tmp_path, SOURCE + f"""
        [blocks.split]
        type = "channelizer"
        channels = 16

        [blocks.keep]
        type = "iq-writer"
        path = "{path}"
        per_channel = {{ from = "split.channels", select = {select} }}

        [[links]]
        from = "source.samples"
        to = "split.samples"
    """)


def test_eight_channels_to_eight_writer_processes(tmp_path, recording):
    """16 channels at 2x oversampling, 8 selected, each to its own writer process; files equal AnalysisBank."""
    flow = writers_flow(tmp_path, "ch{channel:02d}.cf32", '[0, 1, 2, 3, "12..15"]')
    done, report = run_flow(flow, tmp_path / "out")
    assert done.returncode == 0, done.stderr
    assert "Traceback" not in done.stderr
    expected, _ = reference_channels(recording)
    for k in [0, 1, 2, 3, 12, 13, 14, 15]:
        got = np.fromfile(tmp_path / "out" / f"ch{k:02d}.cf32", dtype=np.complex64)
        assert got.shape == (len(expected),)
        assert np.max(np.abs(got - expected[:, k])) <= 1e-6 * np.max(np.abs(expected))
    writers = {name: b["pid"] for name, b in report["blocks"].items() if name.startswith("keep[")}
    assert len(writers) == 8 and len(set(writers.values())) == 8
    all_pids = {b["pid"] for b in report["blocks"].values()}
    assert len(all_pids) == len(report["blocks"]) == 10 and os.getpid() not in all_pids
    assert all(b["state"] == "done" for b in report["blocks"].values())
    assert all(x["dropped_samples"] == 0 and x["sent_samples"] == x["received_samples"] for x in report["links"])


def test_channels_selected_by_frequency(tmp_path, recording):
    """Selecting "156.2 MHz" and "155.7 MHz" picks channels 2 and 13 (centre + k*100 kHz, FFT order)."""
    flow = writers_flow(tmp_path, "{frequency}.cf32", '["156.2 MHz", "155.700 MHz"]')
    done, report = run_flow(flow, tmp_path / "out")
    assert done.returncode == 0, done.stderr
    expected, _ = reference_channels(recording)
    for hz, k in [(156_200_000, 2), (155_700_000, 13)]:
        got = np.fromfile(tmp_path / "out" / f"{hz}.cf32", dtype=np.complex64)
        assert np.max(np.abs(got - expected[:, k])) <= 1e-6 * np.max(np.abs(expected))
    assert sorted(report["blocks"]) == ["keep[13]", "keep[2]", "source", "split"]


def test_round_trip_through_separate_processes(tmp_path, recording):
    """channelizer -> synthesis in separate processes returns the input, delayed by the design's delay."""
    flow = write_flow(tmp_path, SOURCE + """
        [blocks.split]
        type = "channelizer"
        channels = 16

        [blocks.merge]
        type = "synthesis"

        [blocks.keep]
        type = "iq-writer"
        path = "back.cf32"

        [[links]]
        from = "source.samples"
        to = "split.samples"

        [[links]]
        from = "split.channels"
        to = "merge.channels"

        [[links]]
        from = "merge.samples"
        to = "keep.samples"
    """)
    done, report = run_flow(flow, tmp_path / "out")
    assert done.returncode == 0, done.stderr
    design = design_bank(M)
    back = np.fromfile(tmp_path / "out" / "back.cf32", dtype=np.complex64)
    d = design.delay
    assert len(back) == len(recording)
    settled = slice(2 * d, len(back))
    error = back[settled] - recording[settled.start - d:len(back) - d]
    error_db = 10 * np.log10(np.mean(np.abs(error) ** 2) / np.mean(np.abs(recording) ** 2))
    assert error_db <= design.round_trip_error_db + 12 and error_db <= -110


def _free_port():
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def endpoint_flow(tmp_path, port, channel, extra=""):
    """The test recording channelized, one channel exposed at tcp://127.0.0.1:PORT."""
    return write_flow(tmp_path, SOURCE + f"""
        [blocks.split]
        type = "channelizer"
        channels = 16

        [[links]]
        from = "source.samples"
        to = "split.samples"

        [[links]]
        from = "split.channels"
        select = {channel}
        endpoint = "tcp://127.0.0.1:{port}"
        {extra}
    """)


def test_outside_program_consumes_a_channel_from_an_endpoint(tmp_path, recording):
    """A consumer written from docs/wire.md with only pyzmq, msgpack and numpy gets AnalysisBank's channel 2."""
    port = _free_port()
    flow = endpoint_flow(tmp_path, port, 2)
    runner = subprocess.Popen([sys.executable, "-m", "bandloom.runtime", "run", str(flow), "--quiet",
                               "--out", str(tmp_path / "out")], stderr=subprocess.PIPE, text=True)
    ctx = zmq.Context()
    sock = ctx.socket(zmq.DEALER)
    sock.setsockopt(zmq.MAXMSGSIZE, 16 << 20)
    sock.setsockopt(zmq.RCVTIMEO, 60_000)
    sock.connect(f"tcp://127.0.0.1:{port}")
    sock.send(msgpack.packb({"credit": 8}))
    parts, headers = [], []
    try:
        while True:
            header_bytes, payload = sock.recv_multipart()
            assert len(header_bytes) <= 65536
            header = msgpack.unpackb(header_bytes, raw=False, strict_map_key=True)
            assert not header["flags"] & 4, header.get("reason")
            headers.append(header)
            if not header["flags"] & 1:
                rows = np.frombuffer(payload, dtype={"cf32": "<c8", "f32": "<f4"}[header["sample_type"]])
                assert rows.size == header["count"] * header["width"]
                parts.append(rows)
            sock.send(msgpack.packb({"credit": 1, "ack": header["seq"]}))
            if header["flags"] & 1:
                break
    finally:
        sock.close(linger=0)    # a last ack not yet out must not hold term() up
        ctx.term()
    _, stderr = runner.communicate(timeout=120)
    assert runner.returncode == 0, stderr
    got = np.concatenate(parts)
    expected, _ = reference_channels(recording)
    assert np.max(np.abs(got - expected[:, 2])) <= 1e-6 * np.max(np.abs(expected))
    first = headers[0]
    assert first["version"] == 1 and first["sample_rate"] == pytest.approx(200e3)
    assert first["centre_frequency"] == pytest.approx(156.2e6) and first["channels"] == [2]
    assert [h["seq"] for h in headers[:-1]] == list(range(len(headers) - 1))
    assert all(h["first_index"] == sum(x["count"] for x in headers[:i]) for i, h in enumerate(headers))


PACED = """
[blocks.band]
type = "scenario"
sample_rate = "200 kHz"
duration = "60 s"
chunk_size = 10000
pace = true
transmitters = [{ kind = "cw", frequency = "20 kHz", level = "-20 dBFS" }]

[blocks.split]
type = "channelizer"
channels = 8

[blocks.keep]
type = "iq-writer"
path = "ch{channel}.cf32"
per_channel = { from = "split.channels", select = [1, 2] }

[[links]]
from = "band.samples"
to = "split.samples"
"""


def test_ctrl_c_stops_cleanly_and_says_interrupted(tmp_path):
    """SIGINT to the run: sources end their streams, writers flush and close, exit status is the interrupt's."""
    import json
    import signal
    flow = write_flow(tmp_path, PACED)
    runner = subprocess.Popen([sys.executable, "-m", "bandloom.runtime", "run", str(flow), "--quiet",
                               "--out", str(tmp_path / "out"), "--report", str(tmp_path / "r.json")],
                              stderr=subprocess.PIPE, text=True)
    deadline = time.monotonic() + 60                         # wait until both writers have data
    while time.monotonic() < deadline and not all(
            (tmp_path / "out" / f"ch{k}.cf32").exists() and (tmp_path / "out" / f"ch{k}.cf32").stat().st_size
            for k in (1, 2)):
        time.sleep(0.2)
    time.sleep(0.5)
    runner.send_signal(signal.SIGINT)
    _, stderr = runner.communicate(timeout=60)
    assert runner.returncode == -signal.SIGINT, stderr
    report = json.loads((tmp_path / "r.json").read_text())
    assert report["outcome"] == "interrupted"
    assert all(b["state"] == "done" for b in report["blocks"].values())
    sent = {x["link"]: x["sent_samples"] for x in report["links"]}
    for k in (1, 2):
        data = np.fromfile(tmp_path / "out" / f"ch{k}.cf32", np.complex64)
        assert 0 < len(data) == sent[f"split.channels[{k}] -> keep[{k}].samples"]
        assert (tmp_path / "out" / f"ch{k}.sigmf-meta").exists()
    assert "Traceback" not in stderr and "KeyboardInterrupt" not in stderr


def test_status_display_only_on_a_terminal(tmp_path):
    """With stderr on a terminal the run shows a per-block status table; --quiet silences it."""
    import pty
    flow = write_flow(tmp_path, PACED.replace('duration = "60 s"', 'duration = "2 s"'))

    def run(*extra):
        leader, follower = pty.openpty()
        runner = subprocess.Popen([sys.executable, "-m", "bandloom.runtime", "run", str(flow),
                                   "--out", str(tmp_path / "out"), *extra], stderr=follower, stdout=subprocess.DEVNULL)
        os.close(follower)
        chunks = []
        while True:
            try:
                data = os.read(leader, 65536)
            except OSError:
                break
            if not data:
                break
            chunks.append(data)
        runner.wait(timeout=60)
        os.close(leader)
        return b"".join(chunks).decode(errors="replace")

    shown = run()
    assert "block" in shown and "rate" in shown and "queue" in shown and "keep[1]" in shown
    assert "ksps" in shown                                   # rates for people: 20 ksps, never 2e+04
    assert "] " in shown and "%" in shown                     # the source's progress bar
    quiet = run("--quiet")
    assert "queue" not in quiet and "sps" not in quiet


def test_dead_block_is_named_and_run_fails(tmp_path):
    """A block process that dies is reported by name with its exit reason; the rest stop; exit non-zero."""
    import json
    flow = write_flow(tmp_path, PACED)
    runner = subprocess.Popen([sys.executable, "-m", "bandloom.runtime", "run", str(flow),
                               "--out", str(tmp_path / "out"), "--report", str(tmp_path / "r.json")],
                              stderr=subprocess.PIPE, text=True)
    victim = None
    deadline = time.monotonic() + 60
    while victim is None and time.monotonic() < deadline:
        time.sleep(0.3)
        for pid, (_, spec) in worker_processes(below=runner.pid).items():
            if spec.name == "spec-1.json":                  # the channelizer is the second instance
                victim = pid
    assert victim is not None
    time.sleep(2.0)
    os.kill(victim, 9)
    _, stderr = runner.communicate(timeout=60)
    assert runner.returncode == 1
    report = json.loads((tmp_path / "r.json").read_text())
    assert report["blocks"]["split"]["pid"] == victim
    assert f"block 'split' (pid {victim}) died (killed by SIGKILL)" in stderr
    assert report["outcome"] == "failed"
    assert {b["state"] for name, b in report["blocks"].items() if name != "split"} <= {"done", "aborted"}
    assert "Traceback" not in stderr


def test_encrypted_endpoint_needs_the_client_key(tmp_path, recording):
    """An endpoint with keys = (from 'bandloom keys') talks CURVE: the key holder gets the channel, a stranger nothing."""
    import zmq.auth
    keys = tmp_path / "keys"
    made = bandloom("keys", keys)
    assert made.returncode == 0, made.stderr
    port = _free_port()
    flow = endpoint_flow(tmp_path, port, 3, 'keys = "keys"')
    runner = subprocess.Popen([sys.executable, "-m", "bandloom.runtime", "run", str(flow), "--quiet",
                               "--out", str(tmp_path / "out")], stderr=subprocess.PIPE, text=True)
    ctx = zmq.Context()
    stranger = ctx.socket(zmq.DEALER)
    stranger.curve_publickey, stranger.curve_secretkey = zmq.curve_keypair()
    stranger.curve_serverkey, _ = zmq.auth.load_certificate(str(keys / "server.key"))
    stranger.setsockopt(zmq.RCVTIMEO, 1500)
    stranger.connect(f"tcp://127.0.0.1:{port}")
    stranger.send(msgpack.packb({"credit": 8}))
    with pytest.raises(zmq.Again):
        stranger.recv_multipart()
    stranger.close(linger=0)
    client = ctx.socket(zmq.DEALER)
    client.curve_publickey, client.curve_secretkey = zmq.auth.load_certificate(str(keys / "client.key_secret"))
    client.curve_serverkey, _ = zmq.auth.load_certificate(str(keys / "server.key"))
    client.setsockopt(zmq.RCVTIMEO, 60_000)
    client.connect(f"tcp://127.0.0.1:{port}")
    client.send(msgpack.packb({"credit": 8}))
    parts = []
    try:
        while True:
            header_bytes, payload = client.recv_multipart()
            header = msgpack.unpackb(header_bytes, raw=False, strict_map_key=True)
            client.send(msgpack.packb({"credit": 1, "ack": header["seq"]}))
            if header["flags"] & 1:
                break
            parts.append(np.frombuffer(payload, "<c8"))
    finally:
        client.close(linger=0)    # a last ack not yet out must not hold term() up
        ctx.term()
    _, stderr = runner.communicate(timeout=120)
    assert runner.returncode == 0, stderr
    expected, _ = reference_channels(recording)
    assert np.max(np.abs(np.concatenate(parts) - expected[:, 3])) <= 1e-6 * np.max(np.abs(expected))


def test_dropping_link_counts_and_flags_every_lost_sample(tmp_path):
    """A when_full = "drop" link into a slow consumer drops whole messages; every one is counted and flagged."""
    flow = write_flow(tmp_path, """
        [blocks.band]
        type = "scenario"
        sample_rate = "1 MHz"
        duration = "2 s"
        chunk_size = 5000
        pace = true

        [blocks.slow]
        type = "discard"
        rate_limit = "200 kHz"

        [[links]]
        from = "band.samples"
        to = "slow.samples"
        queue = 1
        when_full = "drop"
    """)
    done, report = run_flow(flow, tmp_path)
    assert done.returncode == 0, done.stderr
    link = report["links"][0]
    assert link["dropped_samples"] > 0 and link["dropped_messages"] > 0
    assert link["sent_samples"] + link["dropped_samples"] == 2_000_000
    rows, gaps, missing = (int(v) for v in __import__("re").findall(
        r"discarded (\d+) samples; (\d+) gaps, (\d+) samples missing", report["blocks"]["slow"]["report"][0])[0])
    # every dropped sample shows up as missing at the consumer, flagged by the message after it
    assert rows == link["sent_samples"] and gaps > 0
    assert missing == link["dropped_samples"] == link["missing_samples"]
    assert rows + missing == 2_000_000


def test_grid_offset_and_synthesis_from_a_subset(tmp_path, recording):
    """grid_offset shifts the raster before the bank; synthesis of channels 2..5 alone (others silent) returns
    exactly those channels' part of the band at the original rate and centre."""
    from bandloom.blocks.dsp.mixing import shift_frequency
    flow = write_flow(tmp_path, SOURCE + """
        [blocks.split]
        type = "channelizer"
        channels = 16
        grid_offset = "12.5 kHz"

        [blocks.merge]
        type = "synthesis"

        [blocks.keep]
        type = "iq-writer"
        path = "part.cf32"

        [[links]]
        from = "source.samples"
        to = "split.samples"

        [[links]]
        from = "split.channels"
        select = "2..5"
        to = "merge.channels"

        [[links]]
        from = "merge.samples"
        to = "keep.samples"
    """)
    check = bandloom("check", flow)
    assert "split.channels: 16 channels at 200.0 kHz each, spaced 100.0 kHz" in check.stdout
    done, report = run_flow(flow, tmp_path / "out")
    assert done.returncode == 0, done.stderr
    design = design_bank(M)
    shifted = shift_frequency(recording, 0, -12.5e3 / RATE)
    frames = design.analysis_bank().process(shifted)
    frames[:, [0, 1, 6, 7, 8, 9, 10, 11, 12, 13, 14, 15]] = 0
    expected = shift_frequency(design.synthesis_bank().process(frames), 0, 12.5e3 / RATE)
    got = np.fromfile(tmp_path / "out" / "part.cf32", np.complex64)
    assert np.max(np.abs(got - expected)) <= 1e-5 * np.max(np.abs(expected))
    meta = __import__("json").loads((tmp_path / "out" / "part.sigmf-meta").read_text())
    assert meta["captures"][0]["core:frequency"] == CENTRE and meta["global"]["core:sample_rate"] == RATE


def test_block_that_fails_is_named_with_its_reason(tmp_path):
    """A block whose output cannot be opened fails with the file and the reason; the run exits 1, no traceback."""
    (tmp_path / "out" / "target.cf32").mkdir(parents=True)
    flow = write_flow(tmp_path, """
        [blocks.band]
        type = "scenario"
        sample_rate = "100 kHz"
        duration = "0.5 s"

        [blocks.keep]
        type = "iq-writer"
        path = "target.cf32"

        [[links]]
        from = "band.samples"
        to = "keep.samples"
    """)
    done, report = run_flow(flow, tmp_path / "out")
    assert done.returncode == 1
    assert report["outcome"] == "failed" and report["blocks"]["keep"]["state"] == "failed"
    assert "failed (exit status 1): " in done.stderr and "target.cf32: Is a directory" in done.stderr
    assert "Traceback" not in done.stderr
