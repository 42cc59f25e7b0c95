"""Run the bandloom command line in a real subprocess, as a user would."""

import json
import subprocess
import sys


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
