"""The endpoint-reader block: one flow consuming another flow's endpoint (docs/wire.md), as real processes.

References: the same seeded scenario written directly by the serving flow (the stream must arrive sample for
sample); the serving flow's own counts of what it dropped (the reading flow must count the same rows
missing, and say where its stream starts)."""

import json
import subprocess
import sys
import textwrap
import time

import numpy as np
from runner import bandloom
from test_endpoints import CHUNK, RATE, dropped_so_far, finish, free_port, start_flow


def serve_flow(folder, port, *, seconds=2):
    """A scenario written to ref.cf32 and served on a keyed tcp endpoint."""
    folder.mkdir(parents=True, exist_ok=True)
    assert bandloom("keys", folder / "keys").returncode == 0
    flow = folder / "serve.toml"
    flow.write_text(textwrap.dedent(f"""
        [blocks.band]
        type = "scenario"
        sample_rate = {RATE}
        centre_frequency = "100 MHz"
        duration = {seconds}
        chunk_size = {CHUNK}
        transmitters = [{{ kind = "fm", frequency = "100.01 MHz", level = -10.0 }}]

        [blocks.ref]
        type = "iq-writer"
        path = "ref.cf32"

        [[links]]
        from = "band.samples"
        to = "ref.samples"

        [[links]]
        from = "band.samples"
        endpoint = "tcp://127.0.0.1:{port}"
        keys = "keys"
    """))
    report = folder / "report.json"
    process = subprocess.Popen([sys.executable, "-m", "bandloom.runtime", "run", str(flow), "--out", str(folder),
                                "--report", str(report)], stderr=subprocess.PIPE, text=True)
    return process, report


def read_flow(folder, port, *, keys=None, centre="0 Hz", extra=""):
    folder.mkdir(parents=True, exist_ok=True)
    flow = folder / "read.toml"
    keys_line = f'keys = "{keys}"' if keys else ""
    flow.write_text(textwrap.dedent(f"""
        [blocks.remote]
        type = "endpoint-reader"
        endpoint = "tcp://127.0.0.1:{port}"
        {keys_line}
        sample_rate = {RATE}
        centre_frequency = "{centre}"
        {extra}

        [blocks.keep]
        type = "iq-writer"
        path = "got.cf32"

        [[links]]
        from = "remote.samples"
        to = "keep.samples"
    """))
    return flow


def test_a_flow_takes_another_flows_keyed_endpoint_sample_for_sample(tmp_path):
    port = free_port()
    server, server_report = serve_flow(tmp_path / "serve", port)
    flow = read_flow(tmp_path / "read", port, keys=tmp_path / "serve" / "keys", centre="100 MHz")
    done = bandloom("run", flow, "--out", tmp_path / "read", "--report", tmp_path / "read" / "report.json")
    stderr, served = finish(server, server_report)
    assert server.returncode == 0 and done.returncode == 0, stderr + done.stderr
    assert "verdict: no sample lost" in done.stderr
    got = np.fromfile(tmp_path / "read" / "got.cf32", np.complex64)
    ref = np.fromfile(tmp_path / "serve" / "ref.cf32", np.complex64)
    assert len(got) == 2 * RATE and np.array_equal(got, ref)
    endpoint = next(x for x in served["links"] if "delivered_samples" in x)
    assert endpoint["delivered_samples"] == 2 * RATE and endpoint["consumers"] == 1
    report = json.loads((tmp_path / "read" / "report.json").read_text())
    assert report["blocks"]["remote"]["report"] == [f"took {2 * RATE} samples from tcp://127.0.0.1:{port}, "
                                                    f"indices up to {2 * RATE}"]


def test_a_reader_that_joins_late_counts_the_gap_the_endpoint_dropped(tmp_path):
    """when_full = "drop" at the endpoint: the reader joins after drops began. Its stream keeps the sender's
    indices (the file is zero-filled where samples are missing), and it counts missing exactly the rows the
    endpoint counts dropped; both verdicts say so."""
    port, metrics = free_port(), free_port()
    server, server_report = start_flow(tmp_path, port, extra='when_full = "drop"', args=("--metrics", str(metrics)))
    deadline = time.monotonic() + 60
    while dropped_so_far(metrics) < 3 * CHUNK:
        assert time.monotonic() < deadline and server.poll() is None
        time.sleep(0.2)
    flow = read_flow(tmp_path / "read", port)
    done = bandloom("run", flow, "--out", tmp_path / "read", "--report", tmp_path / "read" / "report.json")
    stderr, served = finish(server, server_report)
    assert server.returncode == 0, stderr
    dropped = served["links"][0]["dropped_samples"]
    assert dropped >= 3 * CHUNK
    assert done.returncode == 3, done.stderr                      # samples lost, and the flow did not accept it
    report = json.loads((tmp_path / "read" / "report.json").read_text())
    missing = [x for x in report["losses"] if x["where"] == "block remote"]
    assert len(missing) == 1 and missing[0]["samples"] == dropped, report["losses"]
    assert f"{dropped} declared dropped by the sender" in missing[0]["why"]
    got = np.fromfile(tmp_path / "read" / "got.cf32", np.complex64)
    assert len(got) == 2 * RATE                                    # absolute time kept, the gap zero-filled
    assert np.count_nonzero(got == 0) >= dropped


def test_a_reader_with_the_wrong_keys_fails_naming_the_endpoint(tmp_path):
    port = free_port()
    server, server_report = serve_flow(tmp_path / "serve", port)
    assert bandloom("keys", tmp_path / "other").returncode == 0
    flow = read_flow(tmp_path / "read", port, keys=tmp_path / "other", centre="100 MHz")
    done = bandloom("run", flow, "--out", tmp_path / "read", "--quiet")
    server.kill()
    server.communicate()
    assert done.returncode == 1
    assert f"tcp://127.0.0.1:{port} refused our keys" in done.stderr
    assert "Traceback" not in done.stderr


def serve_by_hand(port, messages, ready):
    """An outside sender written from docs/wire.md: a ROUTER that waits for a consumer's first request, sends
    ``messages`` ((first_index, rows, flags) each, seq counting up), then keeps answering until told bye."""
    import zmq
    from bandloom.runtime import wire

    ctx = zmq.Context()
    sock = ctx.socket(zmq.ROUTER)
    sock.bind(f"tcp://127.0.0.1:{port}")
    ready.set()
    try:
        if not sock.poll(30_000):
            return
        identity, _ = sock.recv_multipart()
        for seq, (first, rows, flags) in enumerate(messages):
            data = np.full(rows, 0.5 + 0.25j, np.complex64)
            header = wire.encode_header(stream="by hand", seq=seq, first_index=first, count=rows, width=1,
                                        sample_type="cf32", sample_rate=RATE, centre_frequency=0.0, flags=flags,
                                        dropped=0)
            sock.send_multipart([identity, header, data.tobytes()])
        while sock.poll(5_000):
            sock.recv_multipart()
    finally:
        sock.close(linger=0)
        ctx.term()


def run_reader_against(tmp_path, messages):
    import threading

    port = free_port()
    ready = threading.Event()
    sender = threading.Thread(target=serve_by_hand, args=(port, messages, ready), daemon=True)
    sender.start()
    ready.wait(10)
    flow = read_flow(tmp_path, port)
    done = bandloom("run", flow, "--out", tmp_path, "--report", tmp_path / "report.json")
    sender.join(15)
    report = json.loads((tmp_path / "report.json").read_text()) if (tmp_path / "report.json").exists() else None
    return done, report


def test_a_reader_joining_a_long_stream_starts_its_own_at_zero_and_counts_what_came_before(tmp_path):
    """The first message the reader takes is at index 10**9 of the sender's stream: the flow's stream starts
    there (no gigasample of zeros in the file), the report says where it joined, a later declared gap is
    zero-filled in place, and every row missing is counted in the verdict."""
    start = 10 ** 9
    done, report = run_reader_against(tmp_path, [(start, 1000, 0), (start + 1500, 1000, wire_discontinuity()),
                                                 (start + 2500, 0, 1)])
    assert done.returncode == 3, done.stderr
    got = np.fromfile(tmp_path / "got.cf32", np.complex64)
    assert len(got) == 2500 and np.count_nonzero(got == 0) == 500
    loss = next(x for x in report["losses"] if x["where"] == "block remote")
    assert loss["samples"] == start + 500
    assert f"joined at index {start}" in report["blocks"]["remote"]["report"][0]


def test_a_forged_gap_is_refused_before_anything_is_zero_filled(tmp_path):
    """A second message 2**60 rows on, a moment after the first: no sender could have skipped that many; the
    reader fails naming the message, the file holds at most what came before it, and the 1000 rows taken are
    each written or counted lost."""
    done, report = run_reader_against(tmp_path, [(0, 1000, 0), (1 << 60, 1000, wire_discontinuity())])
    assert done.returncode == 1, done.stderr
    assert "a forged or corrupt header" in done.stderr and "Traceback" not in done.stderr
    written = (tmp_path / "got.cf32").stat().st_size // 8
    assert written <= 1000 and report["outcome"] == "failed"
    assert written + report["lost_samples"] == 1000, report["losses"]


def wire_discontinuity():
    from bandloom.runtime import wire
    return wire.FLAG_DISCONTINUITY


def test_a_reader_refuses_keys_other_local_users_can_read(tmp_path):
    """A client key folder open to other users (mode 0755, a secret 0644) is refused by check, naming the file
    and the chmod that mends it: whoever reads the secret can impersonate this flow to the endpoint."""
    import os

    assert bandloom("keys", tmp_path / "keys").returncode == 0
    flow = read_flow(tmp_path, free_port(), keys=tmp_path / "keys")
    os.chmod(tmp_path / "keys" / "client.key_secret", 0o644)
    done = bandloom("check", flow)
    assert done.returncode == 1
    assert "client.key_secret can be read by other local users (mode 0644); run chmod 600" in done.stderr
    assert "Traceback" not in done.stderr
