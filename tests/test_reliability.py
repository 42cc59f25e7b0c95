"""No silent loss: faults injected with real processes, files and sockets, and the accounting checked afterwards."""

import json
import os
import re
import signal
import socket
import subprocess
import sys
import time

import numpy as np
import pytest
from bandloom.blocks.block import BlockContext, BlockError, Loss
from bandloom.runtime.control import StatsMessage, WorkerEvent
from bandloom.runtime.flow import check_flow
from bandloom.runtime.plugins import load_registry
from bandloom.runtime.run_report import summarise, verdict
from bandloom.runtime.supervisor import BlockRecord
from runner import bandloom, start_flow, wait_for_worker

REGISTRY = load_registry()


def make(type_name, params, tmp_path, output_room=None):
    cls = REGISTRY.types[type_name]
    full = {p.name: p.default for p in cls.parameters if not p.required}
    full.update(params)
    return cls(full, BlockContext("b", tmp_path / "flow.toml", tmp_path, output_room=output_room))


def test_a_piped_recording_loses_nothing_on_a_busy_machine(tmp_path, rng, busy_machine):
    """cat capture.cu8 | bandloom run: the reader holds the pipe while processes start and while the flow is
    busy, so every sample of the recording arrives (taken = file length, nothing dropped, verdict clean)."""
    total = 3_000_000
    (rng.integers(0, 256, 2 * total, dtype=np.uint8)).tofile(tmp_path / "capture.cu8")
    flow = tmp_path / "pipe.toml"
    flow.write_text('[blocks.live]\ntype = "stdin-reader"\nformat = "cu8"\nsample_rate = "10 MHz"\nbuffer = "10 ms"\n'
                    '[blocks.split]\ntype = "channelizer"\nchannels = 50\n'
                    '[blocks.sink]\ntype = "discard"\n'
                    '[[links]]\nfrom = "live.samples"\nto = "split.samples"\nqueue = 2\n'
                    '[[links]]\nfrom = "split.channels"\nto = "sink.samples"\nqueue = 2\n')
    with open(tmp_path / "capture.cu8", "rb") as capture:
        done = subprocess.run([sys.executable, "-m", "bandloom.runtime", "run", str(flow), "--quiet", "--out",
                               str(tmp_path), "--report", str(tmp_path / "r.json")], stdin=capture,
                              capture_output=True, timeout=300)
    assert done.returncode == 0, done.stderr.decode()
    assert done.stderr.decode() == "bandloom: verdict: no sample lost\n"
    report = json.loads((tmp_path / "r.json").read_text())
    assert report["blocks"]["live"]["report"][0].startswith(f"took {total} samples; dropped 0 samples")
    first = report["links"][0]
    assert first["sent_samples"] == first["received_samples"] == total and first["missing_samples"] == 0
    assert report["lost_samples"] == 0


@pytest.mark.parametrize("lent", [False, True])
def test_a_file_that_shrinks_while_read_is_an_error_after_its_whole_samples(tmp_path, lent):
    """The whole samples before the new end are delivered; then the reader fails naming the file and the byte.
    ``lent``: the reader reads into room the runtime lends it (as a link's ring does), and delivers the
    whole samples as the first part of that room."""
    path = tmp_path / "band.cf32"
    np.ones(100_000, np.complex64).tofile(path)
    rooms = []

    def output_room(port, shape, dtype):
        rooms.append(np.full(shape, np.nan, dtype))
        return rooms[-1]
    reader = make("iq-reader", {"path": "band.cf32", "sample_rate": 1e6, "chunk_size": 40_000}, tmp_path,
                  output_room if lent else None)
    reader.start({})
    reader.begin()
    first = reader.produce()["samples"][0]
    with open(path, "r+b") as handle:
        handle.truncate(8 * 50_000 + 3)                 # 50 000 whole samples and 3 bytes of the next
    second = reader.produce()["samples"][0]
    assert (first.count, second.first_index, second.count) == (40_000, 40_000, 10_000)
    assert np.all(first.data == 1) and np.all(second.data == 1)
    if lent:
        assert len(rooms) == 2                                         # each chunk the first part of its room
        assert [c.data.ctypes.data for c in (first, second)] == [r.ctypes.data for r in rooms]
        assert np.all(np.isnan(rooms[1][10_001:]))     # the rest not written (10 000 got the 3 partial bytes)
    with pytest.raises(BlockError) as caught:
        reader.produce()
    assert str(caught.value) == (f"{path} ended at byte 400003 while 640000 were expected (the file shrank while "
                                 f"being read); a partial sample of 3 bytes at byte 400000 was not used; the 50000 "
                                 f"whole samples before it were delivered")
    reader.close()


def test_an_endpoint_that_cannot_be_bound_fails_the_run_at_once_naming_the_link(tmp_path):
    """The endpoint's port is held by another program: the block cannot bind; the run fails within seconds
    (no hang), naming the link. (Two links on one port are refused by check before anything starts:
    tests/bad_flows/endpoint-bound-twice.toml.)"""
    holder = socket.socket()
    holder.bind(("127.0.0.1", 0))
    holder.listen()
    port = holder.getsockname()[1]
    (tmp_path / "bind.toml").write_text(
        '[blocks.band]\ntype = "scenario"\nsample_rate = "1 MHz"\nduration = "2 s"\n'
        '[blocks.split]\ntype = "channelizer"\nchannels = 8\n'
        '[[links]]\nfrom = "band.samples"\nto = "split.samples"\n'
        f'[[links]]\nfrom = "split.channels"\nselect = 1\nendpoint = "ipc://{tmp_path}/unused"\n'
        f'[[links]]\nfrom = "split.channels"\nselect = 2\nendpoint = "tcp://127.0.0.1:{port}"\n')
    started = time.monotonic()
    done = bandloom("run", tmp_path / "bind.toml", "--out", tmp_path, timeout=120)
    assert done.returncode == 1 and "Traceback" not in done.stderr
    assert time.monotonic() - started < 60
    holder.close()
    assert (f"link split.channels[2] -> tcp://127.0.0.1:{port}: cannot bind tcp://127.0.0.1:{port}: "
            f"Address already in use") in done.stderr
    # the source never started: the start barrier was never passed, so nothing was sent and nothing lost
    assert re.search(r"band\.samples -> split\.samples\s+0\s+0", done.stderr)
    assert "verdict: no sample lost" in done.stderr


def test_udp_datagrams_the_kernel_dropped_are_counted(tmp_path, rng):
    """Datagrams sent into a small socket buffer before reading starts overflow it; the kernel's own counter
    (SO_RXQ_OVFL) is read, so received + dropped = sent, and the loss is reported, not accepted."""
    with socket.socket(socket.AF_INET, socket.SOCK_DGRAM) as probe:
        probe.bind(("127.0.0.1", 0))
        port = probe.getsockname()[1]
    reader = make("udp-reader", {"sample_rate": 48e3, "port": port, "socket_buffer": 4096, "idle_timeout": 0.5,
                                 "buffer": 60.0}, tmp_path)
    reader.start({})
    payload = np.ones(128, np.complex64).tobytes()           # 1 KiB datagrams
    with socket.socket(socket.AF_INET, socket.SOCK_DGRAM) as sender:
        for _ in range(300):
            sender.sendto(payload, ("127.0.0.1", port))
    reader.begin()
    time.sleep(0.3)
    with socket.socket(socket.AF_INET, socket.SOCK_DGRAM) as sender:
        sender.sendto(payload, ("127.0.0.1", port))          # the kernel stamps its drop count on the next one
    received = 0
    while (out := reader.produce()) is not None:
        received += sum(c.count for c in out.get("samples", []))
    reader.close()
    assert reader.kernel_dropped > 0
    assert received // 128 + reader.kernel_dropped == 301
    loss, = reader.losses()
    assert loss.samples == 128 * reader.kernel_dropped and not loss.accepted and "dropped by the kernel" in loss.reason
    assert reader.next_index == 301 * 128                    # absolute time kept across the dropped datagrams


def test_the_verdict_counts_every_loss_once_and_says_what_was_accepted(tmp_path):
    """Losses reported by blocks and in-flight samples of a stopped run add up in one line; what the flow
    allowed is marked, and accept_loss makes the rest acceptable too."""
    np.zeros(4096, np.complex64).tofile(tmp_path / "in.cf32")
    flow = check_flow({"blocks": {"live": {"type": "iq-reader", "path": "in.cf32", "sample_rate": "1 MHz"},
                                  "sink": {"type": "discard"}},
                       "links": [{"from": "live.samples", "to": "sink.samples"}]},
                      REGISTRY, path=tmp_path / "made.toml")
    live = BlockRecord("live", subprocess.Popen([sys.executable, "-c", "pass"]))
    sink = BlockRecord("sink", subprocess.Popen([sys.executable, "-c", "pass"]))
    from bandloom.runtime.control import InletStats, OutletStats
    live.absorb(StatsMessage(event=WorkerEvent.ABORTED, block="live", pid=1, time=1.0,
                             outputs={0: OutletStats(rows=1000)},
                             losses=[Loss(30, "3 buffers dropped", accepted=True), Loss(5, "unusable datagrams")]))
    sink.absorb(StatsMessage(event=WorkerEvent.ABORTED, block="sink", pid=2, time=1.0, inputs={0: InletStats(rows=900)}))
    for record in (live, sink):
        record.process.wait()
    summary = summarise(flow, {"live": live, "sink": sink}, outcome="interrupted", seconds=1.0)
    assert summary["links"][0]["in_flight_samples"] == 100
    assert (summary["lost_samples"], summary["lost_samples_not_accepted"]) == (135, 105)
    assert verdict(summary) == ("verdict: 135 samples lost: 100 link live.samples -> sink.samples: still in flight "
                                "when the run was interrupted; 30 block live: 3 buffers dropped (allowed by the flow); "
                                "5 block live: unusable datagrams")
    accepted = summarise(flow, {"live": live, "sink": sink}, outcome="interrupted", seconds=1.0, accept_loss=True)
    assert accepted["lost_samples_not_accepted"] == 0 and verdict(accepted).endswith("— accepted (accept_loss)")


def test_rows_waiting_in_a_batch_when_a_run_is_aborted_are_counted_lost(tmp_path):
    """A link with latency = 10 s sends only full batches (256 KiB) and holds the rest in the sender; kill -9
    of another consumer stops the run: the held rows are named in the verdict ("waiting in split's batch"),
    and every link adds up: the channelizer's frames = sent + held, and sent = received + in flight."""
    flow = tmp_path / "held.toml"
    flow.write_text('[blocks.band]\ntype = "scenario"\nsample_rate = 200000\nduration = 20\nchunk_size = 2000\n'
                    'pace = true\n'
                    '[blocks.split]\ntype = "channelizer"\nchannels = 4\n'
                    '[blocks.slow]\ntype = "discard"\n[blocks.victim]\ntype = "discard"\n'
                    '[[links]]\nfrom = "band.samples"\nto = "split.samples"\n'
                    '[[links]]\nfrom = "split.channels"\nselect = 1\nto = "slow.samples"\nlatency = "10 s"\n'
                    '[[links]]\nfrom = "split.channels"\nselect = 2\nto = "victim.samples"\nlatency = 0\n')
    run, report_path = start_flow(flow, tmp_path)
    victim = wait_for_worker(run, "victim")
    time.sleep(1.5)               # 100,000 frames/s fill a batch (32768 rows) about three times a second
    os.kill(victim, signal.SIGKILL)
    stderr = run.communicate(timeout=60)[1]
    report = json.loads(report_path.read_text())
    assert run.returncode == 1, stderr
    held = {x["link"]: x for x in report["links"]}["split.channels[1] -> slow.samples"]
    assert 0 < held["held_samples"] < 32768 and held["sent_samples"] % 32768 == 0
    assert any(x["samples"] == held["held_samples"] and "waiting in split's batch" in x["why"]
               for x in report["losses"])
    frames = report["blocks"]["split"]["samples_out"]
    for x in report["links"][1:]:
        assert frames == x["sent_samples"] + x["held_samples"] + x["dropped_samples"], x
    for x in report["links"]:
        assert x["sent_samples"] == x["received_samples"] + x["in_flight_samples"], x
