"""Endpoints for outside programs (docs/wire.md, "Endpoints"): one consumer at a time, a consumer that
reconnects loses nothing, a late one knows where it starts, and whatever is not acknowledged is counted.

Consumers here are written from docs/wire.md with plain pyzmq and msgpack; the flows are real processes."""

import json
import signal
import socket
import subprocess
import sys
import textwrap
import time

import msgpack
import numpy as np
import pytest
import zmq

RATE = 200_000
CHUNK = 10_000


def free_port():
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def start_flow(tmp_path, port, *, seconds=2, pace=True, extra="", args=(), host="127.0.0.1"):
    flow = tmp_path / "expose.toml"
    flow.write_text(textwrap.dedent(f"""
        [blocks.band]
        type = "scenario"
        sample_rate = {RATE}
        duration = {seconds}
        chunk_size = {CHUNK}
        pace = {str(pace).lower()}
        transmitters = [{{ kind = "cw", frequency = 1000.0, level = -10.0 }}]

        [[links]]
        from = "band.samples"
        endpoint = "tcp://{host}:{port}"
        queue = 4
        {extra}
    """))
    report = tmp_path / "report.json"
    process = subprocess.Popen([sys.executable, "-m", "bandloom.runtime", "run", str(flow), "--out", str(tmp_path),
                                "--report", str(report), *args], stderr=subprocess.PIPE, text=True)
    return process, report


class Consumer:
    """A consumer as docs/wire.md describes it: a DEALER that asks for credit and acknowledges by seq."""

    def __init__(self, ctx, port, credit=4, host="127.0.0.1"):
        self.ctx, self.port, self.credit, self.host = ctx, port, credit, host
        self.connect()

    def connect(self):
        ctx, port, credit = self.ctx, self.port, self.credit
        self.sock = ctx.socket(zmq.DEALER)
        self.sock.setsockopt(zmq.MAXMSGSIZE, 16 << 20)
        self.sock.setsockopt(zmq.RCVTIMEO, 30_000)
        self.sock.setsockopt(zmq.IPV6, 1)
        self.sock.connect(f"tcp://{self.host}:{port}")
        self.sock.send(msgpack.packb({"credit": credit}))

    def receive(self):
        header_bytes, payload = self.sock.recv_multipart()
        header = msgpack.unpackb(header_bytes, raw=False, strict_map_key=True)
        return header, np.frombuffer(payload, "<c8")

    def ack(self, header):
        self.sock.send(msgpack.packb({"credit": 1, "ack": header["seq"]}))

    def take_all(self, *, retry_refused=False):
        """Messages until end of stream, each acknowledged after it is taken. A consumer that reconnects
        right after its last connection closed may be refused once, until the endpoint has seen the close;
        docs/wire.md says to try again then."""
        got = []
        while True:
            header, rows = self.receive()
            if header["flags"] & 4 and retry_refused and not got:
                self.sock.close(linger=0)
                time.sleep(0.5)
                self.connect()
                continue
            assert not header["flags"] & 4, header.get("reason")
            self.ack(header)
            if header["flags"] & 1:
                return got, header
            got.append((header, rows))


def take_whole_stream(port):
    """One consumer, its own context, from attach to end of stream."""
    ctx = zmq.Context()
    consumer = Consumer(ctx, port)
    try:
        return consumer.take_all()
    finally:
        consumer.sock.close(linger=0)    # a last ack not yet out must not hold term() up
        ctx.term()


def dropped_so_far(metrics_port, name="bandloom_link_dropped_samples_total"):
    """The endpoint's drops (or another counter) so far, read from the run's metrics endpoint (0 until it
    answers)."""
    import urllib.request
    try:
        with urllib.request.urlopen(f"http://127.0.0.1:{metrics_port}/metrics", timeout=2) as response:
            text = response.read().decode()
    except OSError:
        return 0
    return sum(float(line.rsplit(" ", 1)[1]) for line in text.splitlines()
               if line.startswith(name + "{"))


def finish(process, report, timeout=60):
    stderr = process.communicate(timeout=timeout)[1]
    return stderr, json.loads(report.read_text())


def test_a_second_consumer_is_refused_while_the_first_takes_the_whole_stream(tmp_path):
    port = free_port()
    process, report_path = start_flow(tmp_path, port)
    ctx = zmq.Context()
    first = Consumer(ctx, port)
    header, rows = first.receive()                 # attached and receiving
    first.ack(header)
    second = Consumer(ctx, port)
    refusal, _ = second.receive()
    assert refusal["flags"] & 4 and "another consumer is attached" in refusal["reason"]
    got, end = first.take_all()
    second.sock.close(linger=0)
    first.sock.close()
    ctx.term()
    stderr, report = finish(process, report_path)
    assert process.returncode == 0, stderr
    indices = [header["first_index"]] + [h["first_index"] for h, _ in got]
    assert indices == list(range(0, 2 * RATE, CHUNK)) and end["first_index"] == 2 * RATE
    link = report["links"][0]
    assert link["consumers"] == 1 and link["refused_consumers"] == 1
    assert link["delivered_samples"] == link["sent_samples"] == 2 * RATE and link["in_flight_samples"] == 0
    assert report["lost_samples"] == 0


def test_a_consumer_that_reconnects_loses_nothing(tmp_path):
    """The first consumer takes six messages, acknowledges four and vanishes without a word (its socket closed
    at once); the next one gets what the first did not acknowledge again, first and in order, then the rest:
    together they have every index, the report counts two consumers and the messages sent again, and nothing
    is lost."""
    port = free_port()
    process, report_path = start_flow(tmp_path, port)
    ctx = zmq.Context()
    first = Consumer(ctx, port, credit=6)
    seen = []
    for number in range(6):
        header, rows = first.receive()
        seen.append(header["first_index"])
        if number < 4:
            first.ack(header)
    time.sleep(0.2)                   # let the acknowledgements leave before the socket goes
    first.sock.close(linger=0)
    second = Consumer(ctx, port)
    got, end = second.take_all(retry_refused=True)
    second.sock.close()
    ctx.term()
    stderr, report = finish(process, report_path)
    assert process.returncode == 0, stderr
    again = [h["first_index"] for h, _ in got]
    assert again[:2] == seen[4:6]                                     # the unacknowledged, sent again first
    assert sorted(set(seen[:4] + again)) == list(range(0, 2 * RATE, CHUNK))
    assert again == sorted(again) and again[0] == seen[3] + CHUNK     # in order, nothing acknowledged twice
    link = report["links"][0]
    assert link["consumers"] == 2 and link["resent_messages"] >= 2
    assert link["delivered_samples"] == link["sent_samples"] == 2 * RATE
    assert "verdict: no sample lost" in stderr


def test_a_late_consumer_of_a_dropping_endpoint_learns_where_it_starts(tmp_path):
    """when_full = "drop": nobody reads for a while, so the endpoint holds its 'queue' oldest messages and
    drops and counts the rest; the late consumer gets the held ones, then a message whose header carries the
    gap (rows dropped before it, and its absolute index); rows received + rows counted missing = the stream,
    and the report's drops are exactly those rows."""
    port, metrics = free_port(), free_port()
    process, report_path = start_flow(tmp_path, port, extra='when_full = "drop"', args=("--metrics", str(metrics)))
    deadline = time.monotonic() + 60
    while dropped_so_far(metrics) < 3 * CHUNK:          # connect only once the endpoint has been dropping
        assert time.monotonic() < deadline and process.poll() is None
        time.sleep(0.2)
    got, end = take_whole_stream(port)
    stderr, report = finish(process, report_path)
    assert process.returncode == 0, stderr
    received = sum(h["count"] for h, _ in got)
    missed = sum(h["dropped"] for h, _ in got) + end["dropped"]
    assert missed > 0 and received + missed == 2 * RATE              # every row: received or counted missing
    position = 0
    for header, rows in got:
        assert header["first_index"] == position + header["dropped"]    # the index says where the gap ends
        assert bool(header["flags"] & 2) == bool(header["dropped"])
        position = header["first_index"] + header["count"]
    assert [h["first_index"] for h, _ in got[:4]] == [0, CHUNK, 2 * CHUNK, 3 * CHUNK]     # the held ones
    link = report["links"][0]
    assert link["dropped_samples"] == missed
    assert link["delivered_samples"] == received
    assert "allowed by the flow" in stderr


def test_nobody_reading_an_endpoint_then_ctrl_c_counts_what_was_never_delivered(tmp_path):
    """Lossless endpoint, no consumer: the source waits; Ctrl-C with --drain-time 1 aborts, and the messages
    the endpoint held are counted as not acknowledged, in the verdict, with the interrupt's exit."""
    port, metrics = free_port(), free_port()
    process, report_path = start_flow(tmp_path, port, pace=False, seconds=30,
                                      args=("--drain-time", "1", "--metrics", str(metrics)))
    deadline = time.monotonic() + 60
    while dropped_so_far(metrics, "bandloom_link_sent_samples_total") < 4 * CHUNK:     # the endpoint is full
        assert time.monotonic() < deadline and process.poll() is None
        time.sleep(0.2)
    process.send_signal(signal.SIGINT)
    stderr, report = finish(process, report_path)
    assert process.returncode == -signal.SIGINT, stderr
    link = report["links"][0]
    assert link["delivered_samples"] == 0 and link["sent_samples"] > 0
    assert link["in_flight_samples"] == link["sent_samples"]
    assert report["losses"] == [{"samples": link["sent_samples"], "where": f"link {link['link']}",
                                 "why": "not acknowledged by a consumer of the endpoint when the run was interrupted",
                                 "accepted": False}]


def test_a_hostile_request_is_refused_and_the_stream_goes_on(tmp_path):
    """Garbage, a huge credit and a forged map are refused with a reason; the endpoint keeps serving, and a
    proper consumer then gets the whole stream."""
    port = free_port()
    process, report_path = start_flow(tmp_path, port, seconds=1)
    ctx = zmq.Context()
    for bad in (b"\xc1\xc1", msgpack.packb({"credit": 10**9}), msgpack.packb({"credit": 1, "eval": "x"}),
                msgpack.packb([1, 2, 3]), b"x" * 1000):
        attacker = ctx.socket(zmq.DEALER)
        attacker.setsockopt(zmq.RCVTIMEO, 10_000)
        attacker.connect(f"tcp://127.0.0.1:{port}")
        attacker.send(bad)
        if len(bad) < 256:
            header = msgpack.unpackb(attacker.recv_multipart()[0], raw=False)
            assert header["flags"] & 4 and header["reason"].startswith("bad request: "), header
        attacker.close(linger=0)
    ctx.term()
    got, end = take_whole_stream(port)
    stderr, report = finish(process, report_path)
    assert process.returncode == 0, stderr
    assert sum(h["count"] for h, _ in got) == RATE and end["first_index"] == RATE
    assert "Traceback" not in stderr


def test_the_consumer_in_docs_wire_md_runs_as_written(tmp_path):
    """The complete consumer of docs/wire.md, taken from the page and run as its own program (only the
    address changed), receives the whole stream."""
    from pathlib import Path
    page = (Path(__file__).parent.parent / "docs" / "wire.md").read_text()
    code = page.split("## A complete consumer", 1)[1].split("```python\n", 1)[1].split("```", 1)[0]
    port = free_port()
    assert "tcp://127.0.0.1:5601" in code
    program = tmp_path / "consumer.py"
    program.write_text(code.replace("tcp://127.0.0.1:5601", f"tcp://127.0.0.1:{port}") +
                       "print(len(samples), np.abs(samples[:5]).round(3).tolist())\n")
    process, report_path = start_flow(tmp_path, port, seconds=1)
    consumer = subprocess.run([sys.executable, str(program)], capture_output=True, text=True, timeout=60)
    stderr, report = finish(process, report_path)
    assert consumer.returncode == 0, consumer.stderr
    assert consumer.stdout.startswith(f"{RATE} ")
    assert process.returncode == 0, stderr
    assert report["links"][0]["delivered_samples"] == RATE


def ipv6_loopback_port():
    """A free port on ::1, or None when this machine has no IPv6 loopback."""
    try:
        with socket.socket(socket.AF_INET6) as s:
            s.bind(("::1", 0))
            return s.getsockname()[1]
    except OSError:
        return None


def test_an_ipv6_endpoint_serves_its_consumer(tmp_path):
    """tcp://[::1]:PORT (RFC 4291 loopback): the endpoint binds with IPv6 enabled and a consumer takes the
    whole stream, rows in order, end of stream last."""
    port = ipv6_loopback_port()
    if port is None:
        pytest.skip("this machine has no IPv6 loopback (::1)")
    process, report = start_flow(tmp_path, port, seconds=0.5, pace=False, host="[::1]")
    ctx = zmq.Context()
    consumer = Consumer(ctx, port, host="[::1]")
    try:
        got, end = consumer.take_all()
    finally:
        consumer.sock.close(linger=0)    # a last ack not yet out must not hold term() up
        ctx.term()
    stderr, summary = finish(process, report)
    assert process.returncode == 0, stderr
    assert sum(len(rows) for _, rows in got) == end["first_index"] == int(RATE * 0.5)
    assert summary["links"][0]["delivered_samples"] == int(RATE * 0.5)
