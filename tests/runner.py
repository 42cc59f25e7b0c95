"""Run the bandloom command line in a real subprocess, as a user would."""

import json
import os
import subprocess
import sys
import time
from pathlib import Path


def bandloom(*args, cwd=None, timeout=240, stdin=None, env=None, binary_stdout=False):
    """Run ``python -m bandloom.runtime ARGS``; stderr is text, stdout text unless ``binary_stdout``."""
    done = subprocess.run([sys.executable, "-m", "bandloom.runtime", *map(str, args)], cwd=cwd,
                          capture_output=True, timeout=timeout, input=stdin, env=env)
    if not binary_stdout:
        done.stdout = done.stdout.decode()
    done.stderr = done.stderr.decode()
    return done


def run_flow(flow_path, out_dir, *extra, timeout=240, cwd=None):
    """Run a flow with a JSON report; return (completed process with bytes stdout, report dict or None)."""
    report = out_dir / "report.json"
    done = bandloom("run", flow_path, "--out", out_dir, "--report", report, "--quiet", *extra, timeout=timeout,
                    binary_stdout=True, cwd=cwd)
    data = json.loads(report.read_text()) if report.exists() else None
    return done, data


def descendants(pid):
    """Every process below ``pid`` (read from /proc)."""
    found, todo = [], [pid]
    while todo:
        parent = todo.pop()
        try:
            tasks = list(Path(f"/proc/{parent}/task").iterdir())
        except OSError:
            continue
        for task in tasks:
            try:
                children = (task / "children").read_text().split()
            except OSError:
                continue
            found += [int(c) for c in children]
            todo += [int(c) for c in children]
    return found


def worker_processes(below=None):
    """{pid: (block instance name, spec file)} of the bandloom workers running now (below process ``below``,
    if given), read from their process titles: ``bandloom worker NAME (TYPE) SPEC``."""
    pids = descendants(below) if below is not None else [int(e) for e in os.listdir("/proc") if e.isdigit()]
    found = {}
    for pid in pids:
        try:
            words = Path(f"/proc/{pid}/cmdline").read_bytes().replace(b"\0", b" ").split()
        except OSError:
            continue
        if words[:2] == [b"bandloom", b"worker"] and len(words) >= 5:
            found[pid] = (words[2].decode(), Path(words[4].decode()))
    return found


def start_flow(flow_path, out_dir):
    """Start ``bandloom run FLOW`` (quiet, with a JSON report) without waiting: (process, report path)."""
    report = Path(out_dir) / "report.json"
    run = subprocess.Popen([sys.executable, "-m", "bandloom.runtime", "run", str(flow_path), "--quiet", "--out",
                            str(out_dir), "--report", str(report)], stderr=subprocess.PIPE, text=True)
    return run, report


def wait_for_worker(run, name, timeout=60):
    """The pid of the worker process ``name`` (its title's name: ``split``, or ``rec[0]..rec[3]`` for copies
    sharing a process) below the running ``run``, once it is there."""
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        found = [pid for pid, (names, _) in worker_processes(below=run.pid).items() if names == name]
        if found:
            return found[0]
        time.sleep(0.2)
    raise AssertionError(f"no worker process {name} within {timeout} s")
