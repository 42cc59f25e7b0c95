"""The supervisor: start one worker process per block instance, watch them, stop them, report.

Local links use ``ipc://`` endpoints in a private temporary folder (mode
0700, removed at exit). The run ends when every worker has finished; the
summary (samples, messages, drops and discontinuities per link, and what
each block reports) goes to stderr. Ctrl-C asks the sources to end their
streams so everything downstream drains and closes its files; if that takes
too long the run is aborted. A worker that dies is named with its exit
reason, the others are aborted cleanly, and the run fails.
"""

from __future__ import annotations

import json
import os
import shutil
import signal
import subprocess
import sys
import tempfile
import time
from dataclasses import dataclass, field

import msgpack
import zmq

from .worker import stream_to_dict

DRAIN_SECONDS = 10.0
ABORT_SECONDS = 5.0
DISPLAY_INTERVAL = 0.5


@dataclass
class BlockState:
    name: str
    process: subprocess.Popen
    state: str = "starting"
    pid: int = 0
    last: dict = field(default_factory=dict)
    rate: float = 0.0
    exit_reason: str = ""
    report: list = field(default_factory=list)


def _describe_exit(code):
    if code is None:
        return "still running"
    if code < 0:
        try:
            return f"killed by {signal.Signals(-code).name}"
        except ValueError:
            return f"killed by signal {-code}"
    return f"exit status {code}"


class Supervisor:
    def __init__(self, flow, *, output_dir, quiet=False, log=sys.stderr):
        self.flow = flow
        self.output_dir = output_dir
        self.quiet = quiet
        self.log = log
        self.show_status = (not quiet) and log.isatty()
        self.blocks = {}
        self.interrupted = False
        self.failed = []
        self.display_lines = 0

    # -- wiring --------------------------------------------------------------------------------
    def specs(self, folder, control, stats):
        endpoints = {link.id: (link.endpoint or f"ipc://{folder}/{link.id}") for link in self.flow.links}
        for inst in self.flow.instances.values():
            inputs = {port: {"link": link.id, "endpoint": endpoints[link.id], "queue": link.queue,
                             "stream": stream_to_dict(link.stream), "label": link.label}
                      for port, link in inst.inputs.items()}
            outputs = {port: [{"link": link.id, "endpoint": endpoints[link.id], "bind": link.endpoint is not None,
                               "columns": link.columns, "queue": link.queue, "when_full": link.when_full,
                               "keys": link.keys, "stream": stream_to_dict(link.stream), "label": link.label}
                              for link in links]
                       for port, links in inst.outputs.items()}
            yield inst, {"name": inst.name, "type": inst.type_name, "params": inst.params,
                         "placeholders": inst.placeholders, "flow_path": str(self.flow.path.resolve()),
                         "output_dir": str(self.output_dir), "inputs": inputs, "outputs": outputs,
                         "control": control, "stats": stats}

    # -- the run -------------------------------------------------------------------------------
    def run(self):
        folder = tempfile.mkdtemp(prefix="bandloom-")          # created with mode 0700
        os.chmod(folder, 0o700)
        context = zmq.Context()
        control = context.socket(zmq.PUB)
        control.setsockopt(zmq.LINGER, 0)
        control.bind(f"ipc://{folder}/control")
        stats = context.socket(zmq.PULL)
        stats.setsockopt(zmq.LINGER, 0)
        stats.bind(f"ipc://{folder}/stats")
        previous = {sig: signal.getsignal(sig) for sig in (signal.SIGINT, signal.SIGTERM)}

        def request_stop(signum, frame):
            self.interrupted = True

        signal.signal(signal.SIGINT, request_stop)
        signal.signal(signal.SIGTERM, request_stop)
        started = time.monotonic()
        try:
            for number, (inst, spec) in enumerate(self.specs(folder, f"ipc://{folder}/control",
                                                             f"ipc://{folder}/stats")):
                spec_path = os.path.join(folder, f"spec-{number}.json")
                with open(spec_path, "w") as handle:
                    json.dump(spec, handle)
                # Only the block that reads standard input gets it, and only the one that
                # writes data to standard output gets that; the rest print to stderr.
                process = subprocess.Popen(
                    [sys.executable, "-m", "bandloom.runtime.worker", spec_path],
                    stdin=None if inst.cls.uses_stdin else subprocess.DEVNULL,
                    stdout=None if inst.cls.uses_stdout else sys.stderr.fileno())
                self.blocks[inst.name] = BlockState(inst.name, process, pid=process.pid)
            self.watch(control, stats)
        finally:
            for state in self.blocks.values():
                if state.process.poll() is None:
                    state.process.kill()
                    state.process.wait()
            signal.signal(signal.SIGINT, previous[signal.SIGINT])
            signal.signal(signal.SIGTERM, previous[signal.SIGTERM])
            control.close()
            stats.close()
            context.term()
            shutil.rmtree(folder, ignore_errors=True)
        self.elapsed = time.monotonic() - started
        self.clear_display()
        return self.outcome()

    def watch(self, control, stats):
        stopping_since = None
        aborting_since = None
        last_display = 0.0
        poller = zmq.Poller()
        poller.register(stats, zmq.POLLIN)
        while True:
            for _ in range(200):
                if not poller.poll(0 if _ else 200):
                    break
                self.absorb(msgpack.unpackb(stats.recv(), raw=False))
            now = time.monotonic()
            for state in self.blocks.values():
                code = state.process.poll()
                if code is not None and state.state not in ("done", "failed", "aborted", "died"):
                    self.drain_stats(stats)
                    if code == 0 and state.state not in ("error",):
                        state.state = state.state if state.state in ("done", "aborted") else "done"
                    else:
                        if state.state != "error":          # an error event already gave the reason
                            state.exit_reason = ""
                        state.state = "died" if state.state != "error" else "failed"
                        self.failed.append(state.name)
            running = [s for s in self.blocks.values() if s.process.poll() is None]
            if not running:
                self.drain_stats(stats)
                return
            if self.failed and aborting_since is None:
                aborting_since = now
            if self.interrupted and stopping_since is None:
                stopping_since = now
                self.say("stopping: sources end their streams, the rest drains (Ctrl-C again is not needed)")
            if stopping_since is not None and aborting_since is None and now - stopping_since > DRAIN_SECONDS:
                self.say(f"still draining after {DRAIN_SECONDS:g} s; aborting")
                aborting_since = now
            for name in self.releasable():
                control.send(b"release " + name.encode())
            if aborting_since is not None:
                control.send(b"abort")
                if now - aborting_since > ABORT_SECONDS:
                    for state in running:
                        state.process.kill()
            elif stopping_since is not None:
                control.send(b"stop")
            if self.show_status and now - last_display >= DISPLAY_INTERVAL:
                self.display()
                last_display = now

    def releasable(self):
        """Blocks that have ended their streams and whose every internal consumer has finished."""
        ready = []
        for name, state in self.blocks.items():
            if state.state != "ending" or state.process.poll() is not None:
                continue
            consumers = {link.target for port in self.flow.instances[name].outputs.values()
                         for link in port if link.target}
            if all(self.blocks[c].process.poll() is not None or self.blocks[c].state in ("done", "aborted")
                   for c in consumers):
                ready.append(name)
        return ready

    def drain_stats(self, stats):
        while True:
            try:
                self.absorb(msgpack.unpackb(stats.recv(zmq.NOBLOCK), raw=False))
            except zmq.Again:
                return

    def absorb(self, message):
        state = self.blocks.get(message.get("block"))
        if state is None:
            return
        previous = state.last
        if previous and message.get("time", 0) > previous.get("time", 0):
            rows = max(message.get("rows_in", 0), message.get("rows_out", 0)) - \
                max(previous.get("rows_in", 0), previous.get("rows_out", 0))
            state.rate = rows / (message["time"] - previous["time"])
        state.last = message
        event = message.get("event")
        if event in ("hello", "stats") and state.state != "ending":
            state.state = "running"
        elif event == "ending":
            state.state = "ending"
        elif event == "done":
            state.state = "done"
            state.report = message.get("report", [])
        elif event == "aborted":
            state.state = "aborted"
            state.report = message.get("report", [])
        elif event == "error":
            state.state = "error"
            state.exit_reason = message.get("message", "")
            state.report = message.get("report", [])

    # -- display and summary -----------------------------------------------------------------------
    def say(self, text):
        if not self.quiet:
            self.clear_display()
            print(f"bandloom: {text}", file=self.log)

    def link_table(self):
        rows = []
        for link in self.flow.links:
            sent = recv = {}
            src = self.blocks.get(link.source)
            if src:
                sent = src.last.get("outputs", {}).get(str(link.id), {})
            dst = self.blocks.get(link.target) if link.target else None
            if dst:
                recv = dst.last.get("inputs", {}).get(str(link.id), {})
            rows.append((link, sent, recv))
        return rows

    def display(self):
        lines = [f"{'block':<24} {'state':<9} {'rate/s':>12} {'samples':>12} {'queue':>6} {'drops':>8}  progress"]
        queue_fill = {}
        for link, sent, recv in self.link_table():
            if link.target:
                in_flight = max(0, sent.get("seq", 0) - (recv.get("seq", -1) + 1))
                queue_fill[link.target] = max(queue_fill.get(link.target, 0.0), min(1.0, in_flight / (2 * link.queue)))
        for name, state in self.blocks.items():
            last = state.last
            drops = sum(o.get("dropped_rows", 0) for o in last.get("outputs", {}).values())
            done = max(last.get("rows_in", 0), last.get("rows_out", 0))
            fill = f"{100 * queue_fill[name]:.0f}%" if name in queue_fill else "-"
            bar = ""
            if last.get("progress") and last["progress"][1]:
                part = min(1.0, last["progress"][0] / last["progress"][1])
                bar = f"[{'#' * int(20 * part):<20}] {100 * part:3.0f}%"
            lines.append(f"{name[:24]:<24} {state.state:<9} {state.rate:>12.4g} {done:>12} {fill:>6} {drops:>8}  {bar}")
        self.clear_display()
        self.log.write("\n".join(lines) + "\n")
        self.log.flush()
        self.display_lines = len(lines)

    def clear_display(self):
        if self.display_lines:
            self.log.write(f"\x1b[{self.display_lines}F\x1b[J")
            self.log.flush()
            self.display_lines = 0

    def outcome(self):
        return "failed" if self.failed else ("interrupted" if self.interrupted else "finished")

    def summary(self):
        """The end-of-run report as a dict (also written by --report)."""
        links = []
        for link, sent, recv in self.link_table():
            links.append({
                "link": link.label, "where": link.where,
                "sent_samples": sent.get("rows", 0), "sent_messages": sent.get("messages", 0),
                "received_samples": recv.get("rows", 0) if link.target else None,
                "received_messages": recv.get("messages", 0) if link.target else None,
                "dropped_samples": sent.get("dropped_rows", 0), "dropped_messages": sent.get("dropped_messages", 0),
                "discontinuities": sent.get("discontinuities", 0),
                "missing_samples": sent.get("missing_rows", 0), "last_index": sent.get("next_index", 0),
            })
        blocks = {name: {"pid": s.pid, "state": s.state, "exit": _describe_exit(s.process.returncode),
                         "reason": s.exit_reason, "report": s.report, "samples_in": s.last.get("rows_in", 0),
                         "samples_out": s.last.get("rows_out", 0)}
                  for name, s in self.blocks.items()}
        return {"flow": str(self.flow.path), "name": self.flow.name, "outcome": self.outcome(),
                "seconds": round(getattr(self, "elapsed", 0.0), 3), "blocks": blocks, "links": links}

    def print_summary(self, summary):
        out = self.log
        print(f"bandloom: flow {summary['name']!r} {summary['outcome']} in {summary['seconds']:.2f} s", file=out)
        for name in self.failed:
            s = self.blocks[name]
            how = "failed" if s.state == "failed" else "died"
            reason = f": {s.exit_reason}" if s.exit_reason else ""
            print(f"bandloom: block {name!r} (pid {s.pid}) {how} ({_describe_exit(s.process.returncode)}){reason}",
                  file=out)
        width = max([len(x["link"]) for x in summary["links"]] + [4])
        print(f"  {'link':<{width}}  {'samples':>12}  {'messages':>9}  {'dropped':>9}  {'missing':>9}  "
              f"{'gaps':>5}", file=out)
        for x in summary["links"]:
            print(f"  {x['link']:<{width}}  {x['sent_samples']:>12}  {x['sent_messages']:>9}  "
                  f"{x['dropped_samples']:>9}  {x['missing_samples']:>9}  {x['discontinuities']:>5}", file=out)
        print("  (dropped: lost on this link when full; missing: lost before it, counted and flagged)", file=out)
        for name, b in summary["blocks"].items():
            for line in b["report"]:
                print(f"  {name}: {line}", file=out)
