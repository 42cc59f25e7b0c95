"""Copies of a per-channel block sharing processes (``copies_per_process``): the same files as one process
each, one copy's failure closes that copy alone, and a killed process is accounted copy by copy.

The reference for the files is the same flow with one process per copy, which the other flow tests hold to
the in-process bank (and that to scipy's brute force, tests/test_banks.py)."""

import json
import os
import signal
import time

import pytest
from runner import bandloom, run_flow, start_flow, wait_for_worker

CHANNEL_SAMPLES = 200_000     # 1 s at 800 kHz, 8 channels twice oversampled: 200 kHz each

FLOW = """
[blocks.band]
type = "scenario"
sample_rate = {rate}
duration = {seconds}
pace = {pace}
chunk_size = 8000
transmitters = [{{ kind = "cw", frequency = 1000.0, level = -10.0 }}, {{ kind = "cw", frequency = 150000.0, level = -20.0 }}]

[blocks.split]
type = "channelizer"
channels = 8

[blocks.rec]
type = "iq-writer"
path = "ch{{channel}}.cf32"
per_channel = {{ from = "split.channels", select = "all" }}
copies_per_process = {copies}
{extra}

[[links]]
from = "band.samples"
to = "split.samples"
"""


def write_flow(folder, *, copies, rate=800_000, seconds=1, pace=False, extra=""):
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / "copies.toml"
    path.write_text(FLOW.format(rate=rate, seconds=seconds, pace=str(pace).lower(), copies=copies, extra=extra))
    return path


def check_accounts(report):
    """Every link adds up: what the channelizer made = sent + held + dropped; sent = received + in flight."""
    frames = report["blocks"]["split"]["samples_out"]
    for link in report["links"][1:]:
        assert frames == link["sent_samples"] + link["held_samples"] + link["dropped_samples"], link
    for link in report["links"]:
        assert link["sent_samples"] == link["received_samples"] + link["in_flight_samples"], link


def test_copies_sharing_processes_write_what_one_process_each_writes(tmp_path):
    """Eight writers three to a process (3 + 3 + 2): the check says so, three processes run them, and every
    file is byte for byte the one a process per copy writes; nothing is lost."""
    alone = write_flow(tmp_path / "alone", copies=1)
    shared = write_flow(tmp_path / "shared", copies=3)
    checked = bandloom("check", shared)
    assert checked.returncode == 0 and "10 blocks in 5 processes" in checked.stdout, checked.stdout
    done_alone, report_alone = run_flow(alone, tmp_path / "alone")
    done, report = run_flow(shared, tmp_path / "shared")
    assert done.returncode == 0 == done_alone.returncode, done.stderr
    assert "verdict: no sample lost" in done.stderr
    pids = [report["blocks"][f"rec[{c}]"]["pid"] for c in range(8)]
    assert len(set(pids)) == 3 and pids[0] == pids[1] == pids[2] != pids[3]
    for channel in range(8):
        ours = (tmp_path / "shared" / f"ch{channel}.cf32").read_bytes()
        assert len(ours) == 8 * CHANNEL_SAMPLES and ours == (tmp_path / "alone" / f"ch{channel}.cf32").read_bytes()
    check_accounts(report)
    assert report["lost_samples"] == 0


@pytest.mark.parametrize("copies", [1, 4])
def test_a_copy_that_fails_at_start_is_closed_alone_and_the_rest_run(tmp_path, copies):
    """Channel 2's file cannot be made (a folder is in its place). With on_failure = "continue" that copy is
    closed and reported, its channel is dropped and counted, and every other copy -- the three in its own
    process too -- writes its whole file; the run fails (exit 1). (Before, a block that failed before its
    start-up hello left the start barrier waiting for ever.)"""
    flow = write_flow(tmp_path, copies=copies, extra='on_failure = "continue"')
    (tmp_path / "ch2.cf32").mkdir()
    done, report = run_flow(flow, tmp_path, timeout=120)
    stderr = done.stderr
    assert done.returncode == 1, stderr
    assert "block 'rec[2]'" in stderr and "Is a directory" in stderr
    assert report["blocks"]["rec[2]"]["state"] == "failed"
    for channel in (0, 1, 3, 4, 5, 6, 7):
        assert report["blocks"][f"rec[{channel}]"]["state"] == "done"
        assert (tmp_path / f"ch{channel}.cf32").stat().st_size == 8 * CHANNEL_SAMPLES
    down = {x["link"]: x for x in report["links"]}["split.channels[2] -> rec[2].samples"]
    assert down["dropped_samples"] == CHANNEL_SAMPLES and down["received_samples"] == 0
    check_accounts(report)
    assert report["lost_samples"] == CHANNEL_SAMPLES
    if copies > 1:
        assert report["blocks"]["rec[2]"]["pid"] == report["blocks"]["rec[3]"]["pid"]


def test_kill_of_a_shared_process_is_accounted_copy_by_copy(tmp_path, busy_machine):
    """kill -9 of the process running writers 0-3, beside two CPU-bound processes: the run fails naming each
    of the four, the other process's writers are stopped with the run, and every link adds up."""
    flow = write_flow(tmp_path, copies=4, rate=400_000, seconds=30, pace=True)
    run, report_path = start_flow(flow, tmp_path)
    victim = wait_for_worker(run, "rec[0]..rec[3]")
    time.sleep(2.0)                               # well into the stream
    os.kill(victim, signal.SIGKILL)
    stderr = run.communicate(timeout=90)[1]
    report = json.loads(report_path.read_text())
    assert run.returncode == 1, stderr
    for channel in range(4):
        block = report["blocks"][f"rec[{channel}]"]
        assert block["state"] == "died" and block["exit"] == "killed by SIGKILL" and block["pid"] == victim
        assert f"block 'rec[{channel}]' (pid {victim}) died (killed by SIGKILL)" in stderr
    for channel in range(4, 8):
        block = report["blocks"][f"rec[{channel}]"]
        assert block["pid"] != victim and block["state"] == "aborted", block
    assert report["outcome"] == "failed"
    check_accounts(report)
    in_flight = sum(x["in_flight_samples"] + x["held_samples"] for x in report["links"])
    assert report["lost_samples"] >= in_flight
    for channel in range(4, 8):                   # the survivors' files hold what they counted as written
        written = (tmp_path / f"ch{channel}.cf32").stat().st_size // 8
        link = {x["link"]: x for x in report["links"]}[f"split.channels[{channel}] -> rec[{channel}].samples"]
        assert 0 < written == link["received_samples"]
