"""The worker launcher: workers forked from one pre-imported process, seen by the supervisor as processes."""

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest
from bandloom.runtime.launcher import Launcher, LaunchError
from runner import run_flow, worker_processes


def test_a_forked_worker_reports_how_it_ended(tmp_path):
    """A worker whose spec file does not exist exits 1 (and says why on stderr); one killed with SIGKILL
    ends as a Popen would say: -9. Both are the launcher's children, not ours."""
    with Launcher() as launcher:
        launcher.preload(["discard"])
        broken = launcher.start(str(tmp_path / "no-such-spec.json"), keep_stdin=False, keep_stdout=False)
        assert broken.wait(timeout=30) == 1 and broken.returncode == 1
        assert Path(f"/proc/{broken.pid}").exists() is False
        os.mkfifo(tmp_path / "wait.json")         # the worker blocks reading its spec from a FIFO: alive
        waiting = launcher.start(str(tmp_path / "wait.json"), keep_stdin=False, keep_stdout=False)
        time.sleep(0.3)
        assert waiting.poll() is None
        parent = int(Path(f"/proc/{waiting.pid}/stat").read_text().rsplit(")", 1)[1].split()[1])
        assert parent == launcher.process.pid != os.getpid()
        waiting.kill()
        assert waiting.wait(timeout=30) == -signal.SIGKILL


def test_an_unknown_block_type_cannot_be_preloaded_and_says_so():
    """Preloading a type that is not installed is refused with its name, not a hang or a traceback."""
    with Launcher() as launcher:
        with pytest.raises(LaunchError, match="block type 'no-such-type' is not installed here"):
            launcher.preload(["no-such-type"])


def test_a_spec_path_with_white_space_is_refused():
    """The protocol is one line of words: a path with a space cannot be sent and is refused by name."""
    with Launcher() as launcher:
        with pytest.raises(LaunchError, match="has white space"):
            launcher.start("/tmp/a b.json", keep_stdin=False, keep_stdout=False)


def test_the_launcher_exits_when_the_supervisor_end_closes():
    """Closing our end of the socket (the run is over, or the supervisor died) ends the launcher at once."""
    launcher = Launcher()
    launcher.preload(["discard"])
    launcher.sock.close()
    assert launcher.process.wait(timeout=10) == 0


def test_workers_of_a_run_are_named_in_ps_and_children_of_the_launcher(tmp_path):
    """While a paced flow runs, each block is one process titled 'bandloom worker NAME (TYPE) SPEC', all
    children of one launcher below the command; the run ends cleanly with nothing lost."""
    flow = tmp_path / "named.toml"
    flow.write_text('[blocks.band]\ntype = "scenario"\nsample_rate = 100000\nduration = 3\npace = true\n'
                    '[blocks.split]\ntype = "channelizer"\nchannels = 4\n'
                    '[blocks.sink]\ntype = "discard"\nper_channel = { from = "split.channels", select = "all" }\n'
                    '[[links]]\nfrom = "band.samples"\nto = "split.samples"\n')
    command = subprocess.Popen([sys.executable, "-m", "bandloom.runtime", "run", str(flow), "--quiet", "--out",
                                str(tmp_path)], stderr=subprocess.PIPE, text=True)
    deadline = time.monotonic() + 60
    titles = {}
    while len(titles) < 6 and time.monotonic() < deadline and command.poll() is None:
        time.sleep(0.2)
        titles = worker_processes(below=command.pid)
    stderr = command.communicate(timeout=60)[1]
    assert command.returncode == 0, stderr
    assert sorted(name for name, _ in titles.values()) == ["band", "sink[0]", "sink[1]", "sink[2]", "sink[3]", "split"]
    assert len({spec.parent for _, spec in titles.values()}) == 1


def test_a_flow_runs_the_same_beside_two_busy_processes(tmp_path, busy_machine):
    """Forked workers under load: a channelizer into per-channel discards, every sample accounted for."""
    flow = tmp_path / "busy.toml"
    flow.write_text('[blocks.band]\ntype = "scenario"\nsample_rate = 1000000\nduration = 2\n'
                    '[blocks.split]\ntype = "channelizer"\nchannels = 8\n'
                    '[blocks.sink]\ntype = "discard"\nper_channel = { from = "split.channels", select = "all" }\n'
                    '[[links]]\nfrom = "band.samples"\nto = "split.samples"\n')
    done, report = run_flow(flow, tmp_path)
    assert done.returncode == 0, done.stderr
    assert report["lost_samples"] == 0
    for link in report["links"]:
        assert link["sent_samples"] == link["received_samples"] and link["held_samples"] == 0
    assert report["blocks"]["band"]["samples_out"] == 2_000_000
    assert all(report["blocks"][f"sink[{k}]"]["samples_in"] == 2_000_000 * 2 // 8 for k in range(8))


def test_a_killed_launcher_fails_the_run_with_every_worker_accounted_for(tmp_path):
    """kill -9 of the launcher mid-run: its workers see their parent gone and abort; the supervisor notices,
    says so, learns that the workers ended although nobody can say how, and fails the run (exit 1) within
    seconds; no worker is left behind."""
    flow = tmp_path / "orphans.toml"
    flow.write_text('[blocks.band]\ntype = "scenario"\nsample_rate = 100000\nduration = 60\npace = true\n'
                    '[blocks.sink]\ntype = "discard"\n[[links]]\nfrom = "band.samples"\nto = "sink.samples"\n')
    command = subprocess.Popen([sys.executable, "-m", "bandloom.runtime", "run", str(flow), "--quiet", "--out",
                                str(tmp_path)], stderr=subprocess.PIPE, text=True)
    deadline = time.monotonic() + 60
    workers = {}
    while len(workers) < 2 and time.monotonic() < deadline:
        time.sleep(0.2)
        workers = worker_processes(below=command.pid)
    launcher = int(Path(f"/proc/{next(iter(workers))}/stat").read_text().rsplit(")", 1)[1].split()[1])
    time.sleep(0.5)
    os.kill(launcher, signal.SIGKILL)
    killed = time.monotonic()
    stderr = command.communicate(timeout=60)[1]
    assert command.returncode == 1, stderr
    assert time.monotonic() - killed < 15
    assert f"the worker launcher (pid {launcher}) died (killed by SIGKILL); its workers stopped" in stderr
    assert not worker_processes(below=command.pid)
