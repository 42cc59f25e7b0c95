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

A flow placed on several hosts is run one share per host (``here``): this
supervisor starts and watches only the blocks placed on its host, and talks
to the other hosts' supervisors through :mod:`.shares` to start, stop and
abort together; its summary shows the other hosts' blocks at the ends of the
links that cross, as their shares last told them.
"""

from __future__ import annotations

import os
import shutil
import signal
import subprocess
import sys
import tempfile
import time
from collections.abc import Mapping
from dataclasses import dataclass, field
from enum import Enum
from pathlib import Path
from typing import Any, TextIO

import zmq
from bandloom.blocks._bank_params import save_designs

from .control import TERMINAL_STATES, BlockState, Control, ControlWord, ProcessEnd, StatsMessage, WorkerEvent, next_state
from .flow import FailurePolicy, Flow, Instance, Link, OnFailure, process_groups
from .launcher import LaunchedProcess, Launcher
from .run_report import StatusDisplay, describe_exit, summarise
from .shared_rings import SUPPORTED as SHARED_MEMORY_SUPPORTED
from .shared_rings import ring_bytes
from .shares import HEARTBEAT_SECONDS, SILENCE_SECONDS, BlockView, RemoteProcess, ShareNetwork, ShareState, ShareStatus
from .worker_spec import LinkSpec, WorkerSpec, specs_to_json

__all__ = ["BlockRecord", "DRAIN_SECONDS", "RunOutcome", "Supervisor"]

DRAIN_SECONDS = 10.0
ABORT_SECONDS = 5.0
DISPLAY_INTERVAL = 0.5
WAIT_FOR_HOSTS = 60.0          # s a share waits for every other host's share before it gives up
REPEAT_SECONDS = 0.1           # a control word that holds is said again this often (PUB may miss a late subscriber)


class RunOutcome(str, Enum):
    FINISHED = "finished"
    INTERRUPTED = "interrupted"
    FAILED = "failed"


@dataclass
class BlockRecord:
    """What the supervisor knows of one block process."""

    name: str
    process: subprocess.Popen | LaunchedProcess | RemoteProcess
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
    shares_process: bool = False  # one of several copies in one process: its error report ends it

    @property
    def pid(self) -> int:
        return self.process.pid

    @property
    def exit_description(self) -> str:
        """How its process ended (``exit status 1``, ``killed by SIGKILL``), or that it runs on."""
        code = self.process.poll()
        if code is None and self.shares_process and self.state in TERMINAL_STATES:
            return "closed; its process runs on for the other copies"
        return describe_exit(code)

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


def link_specs(folder: str, inst: Instance, *, flow: Flow | None = None, earlier: StatsMessage | None = None,
               down: frozenset[str] = frozenset(), rings: Mapping[int, int] | None = None,
               ) -> tuple[dict[str, LinkSpec], dict[str, list[LinkSpec]]]:
    """The ends of ``inst``'s links as its worker opens them. For a restarted block, ``earlier`` holds
    its predecessors' counters (each end resumes where they left it); ``down`` names the blocks that
    are down now (outputs to them start detached). A link that crosses to another host (``flow`` given,
    run as shares) is an endpoint its source's host serves on the link's port, which the consumer's
    host connects to, both with the hosts' keys. ``rings`` gives the links that pass their samples through
    shared memory the size of their ring (see :func:`shared_ring_sizes`)."""
    def spec(link: Link, *, sending: bool) -> LinkSpec:
        resume: dict = {}
        if earlier is not None:
            if sending:
                out = earlier.outputs.get(link.id)
                resume = dict(resume_index=out.next_index if out else 0, resume_seq=out.seq if out else 0)
            else:
                got = earlier.inputs.get(link.id)
                resume = dict(resume_index=got.next_index if got else 0)
        endpoint, bind = link.endpoint or f"ipc://{folder}/{link.id}", link.endpoint is not None if sending else True
        keys = link.options.keys if sending else None
        if flow is not None and flow.crosses(link):
            source_host = flow.hosts[flow.instances[link.source].host or ""]
            endpoint = source_host.endpoint(flow.link_port(link), bind=sending)
            bind, keys = sending, flow.host_keys
        return LinkSpec(link=link.id, label=link.label, endpoint=endpoint, stream=link.stream, bind=bind,
                        columns=link.columns if sending else None, queue=link.options.queue,
                        when_full=link.options.when_full, keys=keys,
                        batch_seconds=link.options.latency if sending and link.target else 0.0,
                        consumer=link.target if sending else None,
                        attached=not (sending and link.target in down),
                        shared_bytes=(rings or {}).get(link.id, 0), **resume)
    inputs = {port: spec(link, sending=False) for port, link in inst.inputs.items()}
    outputs = {port: [spec(link, sending=True) for link in links] for port, links in inst.outputs.items()}
    return inputs, outputs


def shared_ring_sizes(flow: Flow, local: Mapping[str, Instance]) -> dict[int, int]:
    """The links of this machine's blocks that pass their samples through shared memory, each with its
    ring's size: every link between two of ``local`` (forked by one launcher) over the run's private
    folder, unless the flow says ``shared_memory = false`` or this processor is not one rings are safe on
    (:data:`.shared_rings.SUPPORTED`). :data:`.shared_rings.TOTAL_RING_BYTES` is shared out in proportion
    to each link's bytes per second, 1-8 MiB a ring (see :func:`.shared_rings.ring_bytes`)."""
    if not (flow.shared_memory and SHARED_MEMORY_SUPPORTED):
        return {}
    chosen = [link for link in flow.links
              if link.target is not None and link.endpoint is None and link.source in local and link.target in local]
    return ring_bytes({link.id: link.stream.bytes_per_second for link in chosen})


class Supervisor:
    """Runs one flow: ``run()`` returns the outcome, ``summary()`` what happened."""

    def __init__(self, flow: Flow, *, output_dir: str | Path, quiet: bool = False, log: TextIO = sys.stderr,
                 drain_seconds: float = DRAIN_SECONDS, launcher: Launcher | None = None, here: str | None = None,
                 digest: str = "", wait_for_hosts: float = WAIT_FOR_HOSTS) -> None:
        self.flow = flow
        self.here = here              # the host whose share this is (None: the whole flow, on this machine)
        self.local = {name: inst for name, inst in flow.instances.items() if here is None or inst.host == here}
        self.digest = digest
        self.wait_for_hosts = wait_for_hosts
        self.network: ShareNetwork | None = None
        self.peer_trouble = ""        # why the run stopped because of another host
        self.stopping_since: float | None = None
        self.aborting_since: float | None = None
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
        self.rings = shared_ring_sizes(flow, self.local)    # links through shared memory: ring bytes

    def worker_spec(self, inst: Instance, record: BlockRecord | None = None) -> WorkerSpec:
        """What ``inst``'s worker gets; for a restart (``record`` given) its links resume."""
        down = frozenset(name for name, r in self.blocks.items() if r.down)
        inputs, outputs = link_specs(self.folder, inst, flow=self.flow if self.here else None,
                                     earlier=record.earlier if record else None, down=down, rings=self.rings)
        return WorkerSpec(
            name=inst.name, type_name=inst.type_name, params=inst.params, placeholders=inst.placeholders,
            flow_path=str(self.flow.path.resolve()), output_dir=str(self.output_dir), inputs=inputs,
            outputs=outputs, control=f"ipc://{self.folder}/control", stats=f"ipc://{self.folder}/stats",
            restart=record.restarts if record else 0, design_folder=self.folder)

    def start_worker(self, group: list[Instance]) -> LaunchedProcess:
        """Start one worker process for ``group``: one instance, or copies of a per-channel block that share
        a process (``copies_per_process``)."""
        spec_path = os.path.join(self.folder, f"spec-{self.workers_started}.json")   # in flow order; restarts after
        self.workers_started += 1
        with open(spec_path, "w") as handle:     # a restart's record (its links resume), or none yet
            handle.write(specs_to_json([self.worker_spec(inst, self.blocks.get(inst.name)) for inst in group]))
        # Only the block that reads standard input gets it, and only the one that
        # writes data to standard output gets that; the rest print to stderr.
        assert self.launcher is not None
        first = group[0].cls
        ends = [link for inst in group for link in [*inst.inputs.values(), *(x for xs in inst.outputs.values() for x in xs)]]
        rings = {link.id: self.rings[link.id] for link in ends if link.id in self.rings}
        return self.launcher.start(spec_path, keep_stdin=first.uses_stdin, keep_stdout=first.uses_stdout, rings=rings)

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
            if self.here is not None:
                self.network = ShareNetwork(self.flow, self.here, digest=self.digest, context=context)
            if self.launcher is None:
                self.launcher = Launcher()
            self.launcher.preload(sorted({inst.type_name for inst in self.local.values()}))
            for group in process_groups(self.local.values()):
                process = self.start_worker(group)
                for inst in group:
                    self.blocks[inst.name] = BlockRecord(inst.name, process, policy=inst.policy,
                                                         shares_process=len(group) > 1)
            self.watch(control, stats)
            if self.network is not None:
                self.settle_with_peers()
        finally:
            if self.network is not None:
                self.network.close()
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
        last_display = 0.0
        began = time.monotonic()
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
                self.aborting_since = self.aborting_since or now
            for record in self.blocks.values():
                code = record.process.poll()
                if code is None and record.shares_process and record.state is BlockState.ERROR:
                    code = 1          # its process runs on for the other copies; this block is closed
                if code is not None and record.state not in TERMINAL_STATES | {BlockState.RESTARTING}:
                    self.drain_stats(stats)
                    record.process_ended(code)
                    if record.state.is_failure:
                        self.block_failed(record, now, aborting=self.aborting_since is not None)
            if self.failed and self.aborting_since is None:
                self.aborting_since = now
                for record in self.blocks.values():
                    if record.state is BlockState.RESTARTING:     # no new process for an aborted run
                        record.state = BlockState.DIED
            for record in self.blocks.values():
                if record.state is BlockState.RESTARTING and now >= record.restart_at:
                    self.restart(record)
            if self.network is not None:
                self.talk_to_peers(now, began)
            running = [r for r in self.blocks.values() if r.process.poll() is None]
            if not running and not any(r.state is BlockState.RESTARTING for r in self.blocks.values()):
                self.drain_stats(stats)
                return
            if self.interrupted and self.stopping_since is None:
                self.stopping_since = now
                self.say("stopping: sources end their streams, the rest drains (Ctrl-C again is not needed)")
            elif self.network is not None and self.network.stopping() and self.stopping_since is None:
                self.stopping_since = now
                self.say(f"stopping: host {self.network.stopping()[0].name} was asked to stop; sources end their "
                         f"streams, the rest drains")
            if self.stopping_since is not None and self.aborting_since is None and now - self.stopping_since > self.drain_seconds:
                self.say(f"still draining after {self.drain_seconds:g} s; aborting (what is still queued is counted "
                         f"as lost)")
                self.aborting_since = now
            said_hello = (BlockState.RUNNING, BlockState.ENDING, BlockState.DONE)
            if not self.barrier_passed and all(r.state in said_hello or r.left_down for r in self.blocks.values()) and \
                    (self.network is None or self.network.all_ready()):
                self.barrier_passed = True          # every worker (of every host) has said hello: its links are open
            if self.barrier_passed and self.aborting_since is None and not self.failed:
                self.tell(control, now, Control(ControlWord.GO).encode())
            for name in self.releasable():
                self.tell(control, now, Control(ControlWord.RELEASE, name).encode())
            for name in self.network.left_down() if self.network is not None else ():
                self.tell(control, now, Control(ControlWord.DETACH, name).encode())    # left down on its host
            for record in self.blocks.values():
                if record.down:
                    self.tell(control, now, Control(ControlWord.DETACH, record.name).encode())
                elif record.restarts:
                    self.tell(control, now, Control(ControlWord.ATTACH, record.name).encode())
            if self.aborting_since is not None:
                self.tell(control, now, Control(ControlWord.ABORT).encode())
                if now - self.aborting_since > ABORT_SECONDS:
                    for record in running:
                        record.process.kill()
            elif self.stopping_since is not None:
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
        record.process = self.start_worker([inst])
        record.state, record.exit_reason, record.report, record.rate = BlockState.STARTING, "", (), 0.0

    def releasable(self) -> list[str]:
        """Blocks that have ended their streams and whose every internal consumer has finished (a block
        that is restarting has not: its new process still needs the end of stream)."""
        ready = []
        for name, record in self.blocks.items():
            if record.state is not BlockState.ENDING or record.process.poll() is not None:
                continue
            # a consumer on another host acknowledges what it takes (an endpoint): no release needed
            consumers = [self.blocks[link.target] for port in self.flow.instances[name].outputs.values()
                         for link in port if link.target in self.blocks]
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
        if self.failed or self.launcher_lost or self.peer_trouble or any(r.left_down for r in self.blocks.values()):
            return RunOutcome.FAILED
        stopped_by_peer = self.network is not None and self.stopping_since is not None
        return RunOutcome.INTERRUPTED if self.interrupted or stopped_by_peer else RunOutcome.FINISHED

    def summary(self, *, accept_loss: bool = False) -> dict[str, Any]:
        """The end-of-run report as plain values (also what --report writes as JSON)."""
        blocks: dict[str, BlockRecord] = dict(self.blocks)
        if self.network is not None:
            blocks.update(self.remote_records())
        summary = summarise(self.flow, blocks, outcome=self.outcome().value, seconds=self.elapsed,
                            accept_loss=accept_loss or self.flow.accept_loss,
                            local=set(self.local) if self.here else None,
                            gone_hosts=self.network.gone() if self.network is not None else ())
        if self.network is not None:
            summary["host"] = self.here
            summary["other_hosts"] = self.network.report()
        return summary

    # -- shares of a flow on several hosts (see .shares) ---------------------------------------
    def share_status(self, *, final: bool = False) -> ShareStatus:
        """What this share tells the others: its state, and its blocks with their crossing links' counters."""
        crossing = {link.id for link in self.flow.crossing_links()}
        blocks = {}
        for name, record in self.blocks.items():
            totals = record.totals
            blocks[name] = BlockView(
                state=record.state, pid=record.pid, left_down=record.left_down,
                outputs={k: v for k, v in (totals.outputs if totals else {}).items() if k in crossing},
                inputs={k: v for k, v in (totals.inputs if totals else {}).items() if k in crossing})
        if final:
            summary = summarise(self.flow, {**self.blocks, **self.remote_records()}, outcome=self.outcome().value,
                                seconds=self.elapsed, accept_loss=self.flow.accept_loss, local=set(self.local))
            return ShareStatus(host=self.here or "", flow_digest=self.digest, state=ShareState.FINISHED,
                               heard=self.heard(), outcome=self.outcome().value, blocks=blocks,
                               lost_samples=summary["lost_samples"],
                               lost_samples_not_accepted=summary["lost_samples_not_accepted"])
        if self.aborting_since is not None:
            state = ShareState.ABORTING
        elif self.stopping_since is not None:
            state = ShareState.STOPPING
        elif self.barrier_passed:
            state = ShareState.RUNNING
        elif self.blocks and all(r.state is not BlockState.STARTING for r in self.blocks.values()):
            state = ShareState.READY
        else:
            state = ShareState.STARTING
        reason = "; ".join(self.failures()) if state is ShareState.ABORTING else ""
        return ShareStatus(host=self.here or "", flow_digest=self.digest, state=state, heard=self.heard(),
                           reason=reason or ("aborted" if state is ShareState.ABORTING else ""), blocks=blocks)

    def heard(self) -> tuple[str, ...]:
        assert self.network is not None
        return tuple(p.name for p in self.network.peers.values() if p.status is not None)

    def talk_to_peers(self, now: float, began: float) -> None:
        """One turn of the shares' channel: read the peers, say where this share stands, and abort when a
        peer is in trouble or the start waits too long."""
        network = self.network
        assert network is not None
        network.read(now)
        trouble = network.trouble(now)
        if trouble is None and not self.barrier_passed and now - began > self.wait_for_hosts:
            trouble = network.waiting_message(now - began)
        if trouble and not self.peer_trouble:
            self.peer_trouble = trouble
            self.say(trouble)
            self.aborting_since = self.aborting_since or now
        network.publish(self.share_status(), now)

    def settle_with_peers(self) -> None:
        """This share has ended: say so, with its counts, until every peer has finished or is lost (their
        last counters are what this share's summary shows of the links that cross)."""
        network = self.network
        assert network is not None
        final = self.share_status(final=True)
        give_up = time.monotonic() + self.drain_seconds + ABORT_SECONDS + SILENCE_SECONDS
        while True:
            now = time.monotonic()
            network.read(now)
            network.publish(final, now)
            if network.settled(now):
                break
            if now > give_up:
                late = [p.name for p in network.peers.values() if p.state is not ShareState.FINISHED and not p.lost]
                self.say(f"hosts {', '.join(late)} have not finished {give_up - now + self.drain_seconds:.0f} s after "
                         f"this one; their last counts are shown")
                break
            time.sleep(0.05)
        network.publish(final, time.monotonic() + HEARTBEAT_SECONDS)     # once more, for a peer that joined late

    def remote_records(self) -> dict[str, BlockRecord]:
        """Blocks of the other hosts as their shares last told them: state and crossing links' counters."""
        if self.network is None:
            return {}
        records = {}
        for name, (_, view) in self.network.views().items():
            if name in self.blocks:
                continue
            record = BlockRecord(name, RemoteProcess(view.pid), state=view.state, left_down=view.left_down,
                                 policy=self.flow.instances[name].policy if name in self.flow.instances else FailurePolicy())
            record.last = StatsMessage(event=WorkerEvent.STATS, block=name, pid=view.pid, time=0.0,
                                       inputs=dict(view.inputs), outputs=dict(view.outputs))
            records[name] = record
        return records

    @staticmethod
    def failure_line(record: BlockRecord) -> str:
        how = "failed" if record.state is BlockState.FAILED else "died"
        reason = f": {record.exit_reason}" if record.exit_reason else ""
        return f"block {record.name!r} (pid {record.pid}) {how} ({record.exit_description}){reason}"

    def failures(self) -> list[str]:
        """One line per failure: those the run survived (restarted, or left down), then those that stopped it."""
        lines = [line for record in self.blocks.values() for line in record.incidents]
        lines += [self.launcher_lost] if self.launcher_lost else []
        lines += [self.peer_trouble] if self.peer_trouble else []
        return lines + [self.failure_line(self.blocks[name]) for name in self.failed]
