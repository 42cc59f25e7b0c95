"""The supervisor: start one worker process per block instance, watch them, stop them.

Local links use ``ipc://`` endpoints in a private temporary folder (mode
0700, removed at exit). The run ends when every worker has finished. Ctrl-C
asks the sources to end their streams so everything downstream drains and
closes its files; if that takes too long the run is aborted. A worker that
fails or dies is named with its exit reason, and then its block's
``on_failure`` decides: ``stop`` aborts the others cleanly and the run fails;
``restart`` detaches the block from its producers (they drop and count what
they would send it), starts a new process after the restart delay, whose
links resume where the last one's stood, and attaches it again;
``continue`` leaves the block down and the rest running, and the run fails
at its end. What the run did is told by :mod:`.run_report`.
"""

from __future__ import annotations

import os
import shutil
import signal
import subprocess
import sys
import tempfile
import time
from dataclasses import dataclass, field
from enum import Enum
from pathlib import Path
from typing import Any, TextIO

import zmq
from bandloom.blocks._bank_params import save_designs

from .control import TERMINAL_STATES, BlockState, Control, ControlWord, ProcessEnd, StatsMessage, WorkerEvent, next_state
from .flow import FailurePolicy, Flow, Instance, Link, OnFailure
from .launcher import LaunchedProcess, Launcher
from .run_report import StatusDisplay, describe_exit, summarise
from .worker_spec import LinkSpec, WorkerSpec

__all__ = ["BlockRecord", "DRAIN_SECONDS", "RunOutcome", "Supervisor"]

DRAIN_SECONDS = 10.0
ABORT_SECONDS = 5.0
DISPLAY_INTERVAL = 0.5
REPEAT_SECONDS = 0.1           # a control word that holds is said again this often (PUB may miss a late subscriber)


class RunOutcome(str, Enum):
    FINISHED = "finished"
    INTERRUPTED = "interrupted"
    FAILED = "failed"


@dataclass
class BlockRecord:
    """What the supervisor knows of one block process."""

    name: str
    process: subprocess.Popen | LaunchedProcess
    state: BlockState = BlockState.STARTING
    last: StatsMessage | None = None
    rate: float = 0.0             # rows per second between the last two statistics
    exit_reason: str = ""
    report: tuple[str, ...] = ()
    policy: FailurePolicy = FailurePolicy()
    restarts: int = 0             # new processes started after a failure
    earlier: StatsMessage | None = None   # the instances before this one, their counters added up
    incidents: list[str] = field(default_factory=list)   # failures survived (restarted, or left down)
    restart_at: float = 0.0       # monotonic time of the pending restart (state RESTARTING)
    left_down: bool = False       # on_failure = "continue": stays down

    @property
    def pid(self) -> int:
        return self.process.pid

    @property
    def totals(self) -> StatsMessage | None:
        """The counters of every instance of the block so far (one, unless it was restarted)."""
        if self.earlier is None or self.last is None:
            return self.last or self.earlier
        return self.earlier.then(self.last)

    @property
    def down(self) -> bool:
        """Its producers must not wait for it: restarting, a new process not yet ready, or left down."""
        return self.left_down or self.state is BlockState.RESTARTING or (
            bool(self.restarts) and self.state is BlockState.STARTING)

    def absorb(self, message: StatsMessage) -> None:
        """Take a statistics message: counters, rate, and the state change its event makes."""
        previous = self.last
        if previous is not None and message.time > previous.time:
            rows = max(message.rows_in, message.rows_out) - max(previous.rows_in, previous.rows_out)
            self.rate = rows / (message.time - previous.time)
        self.last = message
        self.state = next_state(self.state, message.event)
        if message.event in (WorkerEvent.DONE, WorkerEvent.ABORTED, WorkerEvent.ERROR):
            self.report = tuple(message.report)
        if message.event is WorkerEvent.ERROR:
            self.exit_reason = message.message

    def process_ended(self, code: int) -> None:
        """The process has exited with ``code`` (negative: killed by that signal)."""
        if self.state is not BlockState.ERROR:
            self.exit_reason = ""         # an error event, when there was one, gave the reason
        self.state = next_state(self.state, ProcessEnd.CLEAN if code == 0 else ProcessEnd.FAULT)


def link_specs(folder: str, inst: Instance, *, earlier: StatsMessage | None = None,
               down: frozenset[str] = frozenset()) -> tuple[dict[str, LinkSpec], dict[str, list[LinkSpec]]]:
    """The ends of ``inst``'s links as its worker opens them. For a restarted block, ``earlier`` holds
    its predecessors' counters (each end resumes where they left it); ``down`` names the blocks that
    are down now (outputs to them start detached)."""
    def spec(link: Link, *, sending: bool) -> LinkSpec:
        resume: dict = {}
        if earlier is not None:
            if sending:
                out = earlier.outputs.get(link.id)
                resume = dict(resume_index=out.next_index if out else 0, resume_seq=out.seq if out else 0)
            else:
                got = earlier.inputs.get(link.id)
                resume = dict(resume_index=got.next_index if got else 0)
        return LinkSpec(link=link.id, label=link.label, endpoint=link.endpoint or f"ipc://{folder}/{link.id}",
                        stream=link.stream, bind=link.endpoint is not None if sending else True,
                        columns=link.columns if sending else None, queue=link.options.queue,
                        when_full=link.options.when_full, keys=link.options.keys if sending else None,
                        batch_seconds=link.options.latency if sending and link.target else 0.0,
                        consumer=link.target if sending else None,
                        attached=not (sending and link.target in down), **resume)
    inputs = {port: spec(link, sending=False) for port, link in inst.inputs.items()}
    outputs = {port: [spec(link, sending=True) for link in links] for port, links in inst.outputs.items()}
    return inputs, outputs


class Supervisor:
    """Runs one flow: ``run()`` returns the outcome, ``summary()`` what happened."""

    def __init__(self, flow: Flow, *, output_dir: str | Path, quiet: bool = False, log: TextIO = sys.stderr,
                 drain_seconds: float = DRAIN_SECONDS, launcher: Launcher | None = None) -> None:
        self.flow = flow
        self.launcher = launcher      # forks the workers (see .launcher); one of our own when not given
        self.drain_seconds = drain_seconds
        self.output_dir = output_dir
        self.quiet = quiet
        self.log = log
        self.display = StatusDisplay(log) if (not quiet) and log.isatty() else None
        self.blocks: dict[str, BlockRecord] = {}
        self.interrupted = False
        self.failed: list[str] = []
        self.elapsed = 0.0
        self.barrier_passed = False
        self.folder = ""
        self.workers_started = 0
        self.stop_signal = 0          # SIGINT or SIGTERM, once one asked the run to stop
        self.last_said: dict[bytes, float] = {}      # control message -> when it was last said (see tell)
        self.launcher_lost = ""       # why the run stopped when the worker launcher died under it

    def worker_spec(self, inst: Instance, record: BlockRecord | None = None) -> WorkerSpec:
        """What ``inst``'s worker gets; for a restart (``record`` given) its links resume."""
        down = frozenset(name for name, r in self.blocks.items() if r.down)
        inputs, outputs = link_specs(self.folder, inst, earlier=record.earlier if record else None, down=down)
        return WorkerSpec(
            name=inst.name, type_name=inst.type_name, params=inst.params, placeholders=inst.placeholders,
            flow_path=str(self.flow.path.resolve()), output_dir=str(self.output_dir), inputs=inputs,
            outputs=outputs, control=f"ipc://{self.folder}/control", stats=f"ipc://{self.folder}/stats",
            restart=record.restarts if record else 0, design_folder=self.folder)

    def start_worker(self, inst: Instance, spec: WorkerSpec) -> LaunchedProcess:
        spec_path = os.path.join(self.folder, f"spec-{self.workers_started}.json")   # in flow order; restarts after
        self.workers_started += 1
        with open(spec_path, "w") as handle:
            handle.write(spec.to_json())
        # Only the block that reads standard input gets it, and only the one that
        # writes data to standard output gets that; the rest print to stderr.
        assert self.launcher is not None
        return self.launcher.start(spec_path, keep_stdin=inst.cls.uses_stdin, keep_stdout=inst.cls.uses_stdout)

    # -- the run -------------------------------------------------------------------------------
    def run(self) -> RunOutcome:
        folder = self.folder = tempfile.mkdtemp(prefix="bandloom-")          # created with mode 0700
        os.chmod(folder, 0o700)
        save_designs(folder)            # the banks the check designed: workers load them, not design again
        context = zmq.Context()
        control = context.socket(zmq.PUB)
        control.setsockopt(zmq.LINGER, 0)
        control.bind(f"ipc://{folder}/control")
        stats = context.socket(zmq.PULL)
        stats.setsockopt(zmq.LINGER, 0)
        stats.bind(f"ipc://{folder}/stats")
        previous = {sig: signal.getsignal(sig) for sig in (signal.SIGINT, signal.SIGTERM)}

        def request_stop(signum: int, frame: object) -> None:
            self.interrupted = True
            self.stop_signal = self.stop_signal or signum     # the first one is how the run ends

        signal.signal(signal.SIGINT, request_stop)
        signal.signal(signal.SIGTERM, request_stop)
        started = time.monotonic()
        own_launcher = self.launcher is None
        try:
            if self.launcher is None:
                self.launcher = Launcher()
            self.launcher.preload(sorted({inst.type_name for inst in self.flow.instances.values()}))
            for inst in self.flow.instances.values():
                self.blocks[inst.name] = BlockRecord(inst.name, self.start_worker(inst, self.worker_spec(inst)),
                                                     policy=inst.policy)
            self.watch(control, stats)
        finally:
            for record in self.blocks.values():
                if record.process.poll() is None:
                    record.process.kill()
                    record.process.wait()
            if own_launcher and self.launcher is not None:
                self.launcher.close()
            signal.signal(signal.SIGINT, previous[signal.SIGINT])
            signal.signal(signal.SIGTERM, previous[signal.SIGTERM])
            control.close()
            stats.close()
            context.term()
            shutil.rmtree(folder, ignore_errors=True)
        self.elapsed = time.monotonic() - started
        if self.display:
            self.display.clear()
        return self.outcome()

    def watch(self, control: zmq.Socket, stats: zmq.Socket) -> None:
        stopping_since = None
        aborting_since = None
        last_display = 0.0
        poller = zmq.Poller()
        poller.register(stats, zmq.POLLIN)
        while True:
            for turn in range(200):
                if not poller.poll(0 if turn else 200):
                    break
                self.absorb(stats.recv())
            now = time.monotonic()
            if not self.launcher_lost and self.launcher is not None and self.launcher.process.poll() is not None:
                # its workers see their parent gone and abort themselves: the run cannot go on
                self.launcher_lost = (f"the worker launcher (pid {self.launcher.process.pid}) died "
                                      f"({describe_exit(self.launcher.process.returncode)}); its workers stopped")
                self.say(self.launcher_lost)
                aborting_since = aborting_since or now
            for record in self.blocks.values():
                code = record.process.poll()
                if code is not None and record.state not in TERMINAL_STATES | {BlockState.RESTARTING}:
                    self.drain_stats(stats)
                    record.process_ended(code)
                    if record.state.is_failure:
                        self.block_failed(record, now, aborting=aborting_since is not None)
            if self.failed and aborting_since is None:
                aborting_since = now
                for record in self.blocks.values():
                    if record.state is BlockState.RESTARTING:     # no new process for an aborted run
                        record.state = BlockState.DIED
            for record in self.blocks.values():
                if record.state is BlockState.RESTARTING and now >= record.restart_at:
                    self.restart(record)
            running = [r for r in self.blocks.values() if r.process.poll() is None]
            if not running and not any(r.state is BlockState.RESTARTING for r in self.blocks.values()):
                self.drain_stats(stats)
                return
            if self.interrupted and stopping_since is None:
                stopping_since = now
                self.say("stopping: sources end their streams, the rest drains (Ctrl-C again is not needed)")
            if stopping_since is not None and aborting_since is None and now - stopping_since > self.drain_seconds:
                self.say(f"still draining after {self.drain_seconds:g} s; aborting (what is still queued is counted "
                         f"as lost)")
                aborting_since = now
            said_hello = (BlockState.RUNNING, BlockState.ENDING, BlockState.DONE)
            if not self.barrier_passed and all(r.state in said_hello for r in self.blocks.values()):
                self.barrier_passed = True          # every worker has said hello: its links are open
            if self.barrier_passed and aborting_since is None and not self.failed:
                self.tell(control, now, Control(ControlWord.GO).encode())
            for name in self.releasable():
                self.tell(control, now, Control(ControlWord.RELEASE, name).encode())
            for record in self.blocks.values():
                if record.down:
                    self.tell(control, now, Control(ControlWord.DETACH, record.name).encode())
                elif record.restarts:
                    self.tell(control, now, Control(ControlWord.ATTACH, record.name).encode())
            if aborting_since is not None:
                self.tell(control, now, Control(ControlWord.ABORT).encode())
                if now - aborting_since > ABORT_SECONDS:
                    for record in running:
                        record.process.kill()
            elif stopping_since is not None:
                self.tell(control, now, Control(ControlWord.STOP).encode())
            if self.display and now - last_display >= DISPLAY_INTERVAL:
                self.display.show(self.flow, self.blocks)
                last_display = now

    def tell(self, control: zmq.Socket, now: float, message: bytes) -> None:
        """Say ``message`` to the workers now if it is new, else at most every REPEAT_SECONDS: each one wakes
        every worker, and the loop turns at the rate statistics arrive (a 66-process flow: about a hundred
        times a second)."""
        if now - self.last_said.get(message, -REPEAT_SECONDS) >= REPEAT_SECONDS:
            control.send(message)
            self.last_said[message] = now

    def block_failed(self, record: BlockRecord, now: float, *, aborting: bool) -> None:
        """A block's process failed or died: restart it, leave it down, or stop the run (its on_failure)."""
        policy = record.policy
        what = self.failure_line(record)
        if policy.on_failure is OnFailure.RESTART and record.restarts < policy.restarts and not aborting:
            record.restarts += 1
            delay = policy.delay(record.restarts)
            record.incidents.append(f"{what}; restarted after {delay:g} s (restart {record.restarts} of "
                                    f"{policy.restarts})")
            self.say(f"{what}; restarting it in {delay:g} s (restart {record.restarts} of {policy.restarts})")
            record.earlier, record.last = record.totals, None
            record.state, record.restart_at = BlockState.RESTARTING, now + delay
        elif policy.on_failure is OnFailure.CONTINUE and not aborting:
            record.left_down = True
            record.incidents.append(f"{what}; left down (on_failure = \"continue\"), the rest ran on")
            self.say(f"{what}; the rest of the flow runs on without it (on_failure = \"continue\")")
        else:
            if policy.on_failure is OnFailure.RESTART and record.restarts >= policy.restarts:
                gave_up = f"no restart left (restarts = {policy.restarts})"
                record.exit_reason = f"{record.exit_reason}; {gave_up}" if record.exit_reason else gave_up
            self.failed.append(record.name)

    def restart(self, record: BlockRecord) -> None:
        inst = self.flow.instances[record.name]
        record.process = self.start_worker(inst, self.worker_spec(inst, record))
        record.state, record.exit_reason, record.report, record.rate = BlockState.STARTING, "", (), 0.0

    def releasable(self) -> list[str]:
        """Blocks that have ended their streams and whose every internal consumer has finished (a block
        that is restarting has not: its new process still needs the end of stream)."""
        ready = []
        for name, record in self.blocks.items():
            if record.state is not BlockState.ENDING or record.process.poll() is not None:
                continue
            consumers = [self.blocks[link.target] for port in self.flow.instances[name].outputs.values()
                         for link in port if link.target]
            if all(c.left_down or (not c.down and (c.process.poll() is not None
                                                   or c.state in (BlockState.DONE, BlockState.ABORTED)))
                   for c in consumers):
                ready.append(name)
        return ready

    def drain_stats(self, stats: zmq.Socket) -> None:
        while True:
            try:
                self.absorb(stats.recv(zmq.NOBLOCK))
            except zmq.Again:
                return

    def absorb(self, raw: bytes) -> None:
        message = StatsMessage.decode(raw)
        record = self.blocks.get(message.block)
        if record is not None and message.pid == record.pid:      # not a late word from a process replaced
            record.absorb(message)

    def say(self, text: str) -> None:
        if not self.quiet:
            if self.display:
                self.display.clear()
            print(f"bandloom: {text}", file=self.log)

    # -- outcome -------------------------------------------------------------------------------
    def outcome(self) -> RunOutcome:
        if self.failed or self.launcher_lost or any(r.left_down for r in self.blocks.values()):
            return RunOutcome.FAILED
        return RunOutcome.INTERRUPTED if self.interrupted else RunOutcome.FINISHED

    def summary(self, *, accept_loss: bool = False) -> dict[str, Any]:
        """The end-of-run report as plain values (also what --report writes as JSON)."""
        return summarise(self.flow, self.blocks, outcome=self.outcome().value, seconds=self.elapsed,
                         accept_loss=accept_loss or self.flow.accept_loss)

    @staticmethod
    def failure_line(record: BlockRecord) -> str:
        how = "failed" if record.state is BlockState.FAILED else "died"
        reason = f": {record.exit_reason}" if record.exit_reason else ""
        return f"block {record.name!r} (pid {record.pid}) {how} ({describe_exit(record.process.returncode)}){reason}"

    def failures(self) -> list[str]:
        """One line per failure: those the run survived (restarted, or left down), then those that stopped it."""
        lines = [line for record in self.blocks.values() for line in record.incidents]
        lines += [self.launcher_lost] if self.launcher_lost else []
        return lines + [self.failure_line(self.blocks[name]) for name in self.failed]
