"""A block's on_failure: kill -9 of a per-channel writer in the middle of a paced run, on a busy machine.

The writer under test (``keep``) and an untouched twin (``twin``) take the same channels from one
channelizer, so the twin's files are what the restarted writer's files must hold outside the gap. The
accounting is checked afterwards: per link, sent = received + lost at the restart + in flight, and every
zero the restarted writer filled in is a sample the verdict counts as lost.
"""

import json
import os
import signal
import subprocess
import sys
import time

import numpy as np
from runner import worker_processes

RATE = 400_000          # input samples per second; 8 channels, twice oversampled: 100,000 per channel


def flow_text(policy, *, seconds=4.0):
    return f"""
[blocks.band]
type = "scenario"
sample_rate = {RATE}
duration = "{seconds} s"
chunk_size = 10000
pace = true
transmitters = [{{ kind = "noise", frequency = "25 kHz", bandwidth = "40 kHz", level = "-20 dBFS" }}]

[blocks.split]
type = "channelizer"
channels = 8

[blocks.keep]
type = "iq-writer"
path = "keep{{channel}}.sigmf-data"
per_channel = {{ from = "split.channels", select = [1, 2] }}
{policy}

[blocks.twin]
type = "iq-writer"
path = "twin{{channel}}.sigmf-data"
per_channel = {{ from = "split.channels", select = [1, 2] }}

[[links]]
from = "band.samples"
to = "split.samples"
"""


def worker_pids(name):
    """PIDs of the worker processes running block instance ``name`` (from their process titles)."""
    return [pid for pid, (instance, _) in worker_processes().items() if instance == name]


def kill_when_written(name, path, size, *, not_pid=None, timeout=60):
    """Wait until ``path`` holds ``size`` bytes and a worker of ``name`` (other than ``not_pid``) runs;
    kill it with SIGKILL and return its PID."""
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        pids = [p for p in worker_pids(name) if p != not_pid]
        if pids and path.exists() and path.stat().st_size >= size:
            os.kill(pids[0], signal.SIGKILL)
            return pids[0]
        time.sleep(0.02)
    raise AssertionError(f"{name} never wrote {size} bytes to {path}")


def start(tmp_path, policy, **options):
    flow = tmp_path / "restarts.toml"
    flow.write_text(flow_text(policy, **options))
    out = tmp_path / "out"
    report = tmp_path / "report.json"
    run = subprocess.Popen([sys.executable, "-m", "bandloom.runtime", "run", str(flow), "--quiet", "--out", str(out),
                            "--report", str(report)], stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    return run, out, report


def finish(run, report):
    _, stderr = run.communicate(timeout=120)
    return run.returncode, stderr.decode(), json.loads(report.read_text())


def kill_once(tmp_path, policy, *, size, seconds=4.0):
    """Run the flow with ``policy`` for keep; kill keep[1] once its file holds ``size`` bytes; return
    (the PID killed, exit status, stderr, report, output folder)."""
    run, out, report_path = start(tmp_path, policy, seconds=seconds)
    victim = kill_when_written("keep[1]", out / "keep1.sigmf-data", size)
    return (victim, *finish(run, report_path), out)


def link_of(report, target):
    return next(x for x in report["links"] if x["link"].endswith(f"-> {target}.samples"))


def losses_at(report, target):
    """Samples the verdict counts as lost on ``target``'s input link or in ``target`` itself."""
    link = link_of(report, target)["link"]
    return sum(x["samples"] for x in report["losses"] if x["where"] in (f"link {link}", f"block {target}"))


def assert_links_add_up(report):
    """Every link: sent = received + lost at a restart of its consumer + in flight."""
    for x in report["links"]:
        assert x["sent_samples"] == (x["received_samples"] + x["lost_at_restart_samples"]
                                     + x["in_flight_samples"]), x


def test_a_killed_writer_is_restarted_and_its_file_keeps_absolute_time(tmp_path, busy_machine):
    """on_failure = "restart": the killed writer is replaced within its delay, continues the same file,
    and the file has the twin's samples everywhere except in the annotated zero-filled gap; the gap's
    length is exactly what the verdict counts lost on that link; the run exits with the loss status (3)."""
    victim, code, stderr, report, out = kill_once(tmp_path, 'on_failure = "restart"\nrestart_delay = "0.3 s"',
                                                  size=800_000)

    assert code == 3, stderr
    assert report["outcome"] == "finished"
    assert f"block 'keep[1]' (pid {victim}) died (killed by SIGKILL); restarted after 0.3 s (restart 1 of 3)" in stderr
    assert report["blocks"]["keep[1]"]["restarts"] == 1
    assert report["blocks"]["keep[2]"]["restarts"] == 0
    assert_links_add_up(report)

    kept = np.fromfile(out / "keep1.sigmf-data", np.complex64)
    twin = np.fromfile(out / "twin1.sigmf-data", np.complex64)
    assert len(kept) == len(twin) == RATE * 4 // 4          # the whole channel stream, in absolute time
    gaps = json.loads((out / "keep1.sigmf-meta").read_text())["annotations"]
    assert gaps, "the restart's gap is annotated"
    in_gap = np.zeros(len(kept), bool)
    for gap in gaps:
        in_gap[gap["core:sample_start"]:gap["core:sample_start"] + gap["core:sample_count"]] = True
    assert np.all(kept[in_gap] == 0)
    np.testing.assert_array_equal(kept[~in_gap], twin[~in_gap])
    assert in_gap.sum() == losses_at(report, "keep[1]") > 0
    assert link_of(report, "keep[1]")["dropped_while_down_samples"] > 0
    assert "dropped while keep[1] was down" in stderr.splitlines()[-1]
    # the other channel of the same block, and the twins, lost nothing
    for other in ("keep[2]", "twin[1]", "twin[2]"):
        assert losses_at(report, other) == 0
    np.testing.assert_array_equal(np.fromfile(out / "keep2.sigmf-data", np.complex64),
                                  np.fromfile(out / "twin2.sigmf-data", np.complex64))


def test_continue_leaves_the_block_down_and_the_rest_runs_to_the_end(tmp_path, busy_machine):
    """on_failure = "continue": the other writers complete their files; the run ends failed (exit 1),
    names the block, and counts what the dead writer never read as lost on its link."""
    victim, code, stderr, report, out = kill_once(tmp_path, 'on_failure = "continue"', size=400_000, seconds=3.0)

    assert code == 1, stderr
    assert report["outcome"] == "failed"
    assert f"block 'keep[1]' (pid {victim}) died (killed by SIGKILL); left down" in stderr
    assert report["blocks"]["keep[1]"]["restarts"] == 0
    assert_links_add_up(report)
    for other, path in (("keep[2]", "keep2"), ("twin[1]", "twin1"), ("twin[2]", "twin2")):
        assert losses_at(report, other) == 0
        assert len(np.fromfile(out / f"{path}.sigmf-data", np.complex64)) == RATE * 3 // 4
    lost = losses_at(report, "keep[1]")
    in_file = len(np.fromfile(out / "keep1.sigmf-data", np.complex64))
    assert in_file + lost >= RATE * 3 // 4          # what it wrote, and the rest counted (some it read unreported)
    assert lost >= RATE * 3 // 4 - in_file - 10_000 > 0
    assert "dropped while keep[1] was down (on_failure = \"continue\")" in stderr.splitlines()[-1]


def test_when_no_restart_is_left_the_run_fails_naming_the_block(tmp_path, busy_machine):
    """restarts = 1: the first kill is survived, the second stops the run (exit 1) with a line saying no
    restart was left; the accounting still adds up on every link."""
    run, out, report_path = start(tmp_path, 'on_failure = "restart"\nrestarts = 1\nrestart_delay = "0.1 s"',
                                  seconds=30.0)
    first = kill_when_written("keep[1]", out / "keep1.sigmf-data", 400_000)
    size = (out / "keep1.sigmf-data").stat().st_size
    second = kill_when_written("keep[1]", out / "keep1.sigmf-data", size + 400_000, not_pid=first)
    code, stderr, report = finish(run, report_path)

    assert code == 1, stderr
    assert report["outcome"] == "failed"
    assert f"block 'keep[1]' (pid {first}) died (killed by SIGKILL); restarted after 0.1 s" in stderr
    assert (f"block 'keep[1]' (pid {second}) died (killed by SIGKILL): no restart left (restarts = 1)"
            in stderr)
    assert report["blocks"]["keep[1]"]["restarts"] == 1
    assert_links_add_up(report)
    assert "Traceback" not in stderr



def test_a_killed_writer_of_a_reader_that_reads_into_shared_memory_is_restarted_and_all_is_counted(tmp_path,
                                                                                                 busy_machine):
    """iq-reader reads a paced cf32 file straight into room its link lends it in shared memory; the one
    writer is killed in the middle and restarted. Afterwards: per link sent = received + lost at the restart
    + in flight; the file keeps absolute time and equals the recording everywhere but in the annotated
    zero-filled gap, whose length is what the verdict counts lost; the link went through shared memory and
    copied only the recording's last, short chunk (1,600,000 mod 65,536 = 27,136 samples, less than a
    256 KiB batch)."""
    recording = (np.random.default_rng(3).standard_normal((1_600_000, 2)) * 0.1).astype(np.float32)
    recording.tofile(tmp_path / "band.cf32")
    flow = tmp_path / "reader.toml"
    flow.write_text(f"""
[blocks.read]
type = "iq-reader"
path = "band.cf32"
metadata = "none"
sample_rate = {RATE}
pace = true

[blocks.keep]
type = "iq-writer"
path = "keep.sigmf-data"
on_failure = "restart"
restart_delay = "0.3 s"

[[links]]
from = "read.samples"
to = "keep.samples"
""")
    out, report_path = tmp_path / "out", tmp_path / "report.json"
    run = subprocess.Popen([sys.executable, "-m", "bandloom.runtime", "run", str(flow), "--quiet", "--out", str(out),
                            "--report", str(report_path)], stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    kill_when_written("keep", out / "keep.sigmf-data", 8 * 500_000)
    code, stderr, report = finish(run, report_path)

    assert code == 3, stderr
    assert report["blocks"]["keep"]["restarts"] == 1
    assert_links_add_up(report)
    kept = np.fromfile(out / "keep.sigmf-data", np.complex64)
    assert len(kept) == 1_600_000
    in_gap = np.zeros(len(kept), bool)
    for gap in json.loads((out / "keep.sigmf-meta").read_text())["annotations"]:
        in_gap[gap["core:sample_start"]:gap["core:sample_start"] + gap["core:sample_count"]] = True
    assert np.all(kept[in_gap] == 0)
    np.testing.assert_array_equal(kept[~in_gap], recording.view(np.complex64)[:, 0][~in_gap])
    assert in_gap.sum() == losses_at(report, "keep") > 0
    link = link_of(report, "keep")
    assert link["shared_memory_messages"] > 0 and link["copied_bytes"] == 27_136 * 8
