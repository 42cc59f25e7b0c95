"""One block's process: ``python -m bandloom.runtime.worker SPEC.json``.

The supervisor starts one worker per block instance, or one for several
copies of a per-channel block (``copies_per_process``: :class:`WorkerProcess`
runs them in one loop, each with its own links, counters and statistics;
one that fails is closed and reported alone, the others go on). A worker builds its
block, binds its inputs, connects its outputs, then moves chunks until every
input has ended (or, for a source, until the block has nothing more or a stop
is requested), sends end of stream downstream, closes the block (flushing
files) and exits 0. It ignores Ctrl-C itself: the supervisor coordinates the
stop, so that sources end their streams and everything downstream drains.

Control messages from the supervisor and statistics back to it are those of
:mod:`.control`: ``stop`` (sources end their streams), ``abort`` (close
everything now), ``release NAME`` (every consumer of block NAME has read its
end of stream, so NAME may close its links), ``detach NAME`` and ``attach
NAME`` (block NAME is down, or up again: see :mod:`.links`); statistics twice
a second and at every change of state.

Why the release: ZeroMQ counts a message as sent once it is written to the
connection. If the sender then closes while the receiver, held back by its
high-water mark, has not yet read the rest of the connection, the receiver
drops what is left when it sees the connection close. So a block that has
sent its end of stream keeps its connections open until the supervisor says
its consumers have finished.
"""

from __future__ import annotations

import os
import shutil
import signal
import sys
import tempfile
import time
import traceback
from collections.abc import Callable
from functools import partial
from pathlib import Path

import numpy as np
import setproctitle
import zmq
from bandloom.blocks.block import Block, BlockContext, Output, chunks_of

from . import wire
from ._memory import reuse_chunk_buffers
from .control import Control, ControlWord, StatsMessage, WorkerEvent
from .endpoint_client import EndpointInlet
from .endpoints import EndpointOutlet
from .links import BATCH_POLL_MS, POLL_MS, Aborted, Inlet, Outlet, column_major
from .plugins import load_registry
from .worker_spec import WorkerSpec, specs_from_json

__all__ = ["Worker", "WorkerProcess", "describe_failure", "main"]

STATS_INTERVAL = 0.5


class Worker:
    """One block between its inlets and outlets (see the module doc), in a process of its own or sharing
    one with other copies of its per-channel block (``process``, a :class:`WorkerProcess`)."""

    def __init__(self, spec: WorkerSpec, process: WorkerProcess | None = None) -> None:
        self.spec = spec
        self.name = spec.name
        self.process = process if process is not None else WorkerProcess(spec)
        self.context = self.process.context
        self.stats_socket = self.process.stats_socket
        self.released = False
        self.inlets: list[Inlet] = []
        self.outlets: dict[str, list[Outlet]] = {}
        self.lent_to: list[Outlet] = []        # outlets that lent the block room for its next chunk
        self.block: Block | None = None
        self.last_stats = 0.0
        self.rows_in = 0
        self.rows_out = 0
        self.started = time.monotonic()
        self.first_rows_clock: float | None = None   # when the block first took or made rows
        self.busy_seconds = 0.0                      # inside produce, consume and finish
        self.closed: WorkerEvent | None = None       # how the block was closed, once it was
        self.process.workers.append(self)

    # what the whole process was told (see WorkerProcess)
    go = property(lambda self: self.process.go)
    stop = property(lambda self: self.process.stop)
    abort = property(lambda self: self.process.abort)
    control = property(lambda self: self.process.control)
    parent_gone = property(lambda self: self.process.parent_gone)

    def poll_control(self) -> bool:
        """Read what the supervisor said (for every block of the process); True once the run is being aborted."""
        return self.process.poll_control()

    # -- control and statistics -------------------------------------------------------------
    def hear(self, message: Control) -> None:
        """A control word about this block, or about a block this one sends to."""
        if message.word is ControlWord.RELEASE and message.block == self.name:
            self.released = True
        elif message.word in (ControlWord.DETACH, ControlWord.ATTACH):
            for outlet in self.outlets_to(message.block):
                outlet.detach() if message.word is ControlWord.DETACH else outlet.attach()
        elif message.word is ControlWord.STOP and not self.stop and self.block is not None and self.block.is_source:
            self.block.stop_requested()

    def all_outlets(self) -> list[Outlet]:
        """Every outlet of every output port."""
        return [o for outs in self.outlets.values() for o in outs]

    def flush_due_batches(self) -> bool:
        """Send batches whose oldest rows have waited long enough; True while any outlet still holds rows."""
        holding = False
        for outlet in self.all_outlets():
            outlet.flush_if_due()
            holding = holding or outlet.holding
        return holding

    def outlets_to(self, consumer: str | None) -> list[Outlet]:
        return [o for o in self.all_outlets() if consumer and o.spec.consumer == consumer]

    def send_stats(self, event: WorkerEvent = WorkerEvent.STATS, *, report: list[str] | None = None,
                   message: str = "") -> None:
        progress = self.block.progress() if self.block is not None and self.block.is_source else None
        stats = StatsMessage(
            event=event, block=self.name, pid=os.getpid(), time=time.monotonic() - self.started,
            rows_in=self.rows_in, rows_out=self.rows_out,
            inputs={i.id: i.stats() for i in self.inlets},
            outputs={o.id: o.stats() for o in self.all_outlets()},
            progress=(int(progress[0]), int(progress[1])) if progress else None,
            report=report or [], losses=list(self.block.losses()) if self.block is not None else [],
            message=message, started_clock=self.started, first_rows_clock=self.first_rows_clock,
            busy_seconds=round(self.busy_seconds, 6), cpu_seconds=round(time.process_time(), 6))
        self.stats_socket.send(stats.encode())
        self.last_stats = time.monotonic()

    def maybe_stats(self) -> None:
        """Statistics, when the last ones are STATS_INTERVAL old (the loops poll control themselves)."""
        if time.monotonic() - self.last_stats >= STATS_INTERVAL:
            self.send_stats()

    def while_waiting(self) -> bool:
        """Asked by a link while it waits for room: keep the statistics flowing (a waiting block is
        still watched and scraped) and say whether the run is being aborted."""
        self.maybe_stats()
        return self.poll_control()

    # -- set up ------------------------------------------------------------------------------
    def build(self) -> Block:
        spec = self.spec
        registry = load_registry(only=spec.type_name)
        cls = registry.types.get(spec.type_name)
        if cls is None:
            raise RuntimeError(f"block type {spec.type_name!r} is not installed here")
        context = BlockContext(self.name, Path(spec.flow_path), Path(spec.output_dir), spec.placeholders,
                               restart=spec.restart, design_folder=Path(spec.design_folder) if spec.design_folder else None,
                               resumed_at={port: link.resume_index for port, link in spec.inputs.items()
                                           if link.resume_index is not None},
                               output_room=self.lend_output_room)
        block = self.block = cls(spec.params, context)
        inputs = {port: link.stream for port, link in spec.inputs.items()}
        block.output_streams(dict(inputs))          # validates again, in this process
        for port, link in spec.inputs.items():       # an input from another host connects to its endpoint
            self.inlets.append((Inlet if link.bind else EndpointInlet)(self.context, link, port))
        for port, links in spec.outputs.items():
            self.outlets[port] = [(EndpointOutlet if link.bind else Outlet)(self.context, link, self.while_waiting)
                                  for link in links]
        block.start(inputs)
        for inlet in self.inlets:
            inlet.take_over(block.kept_from_predecessor(inlet.port))
        self.send_stats(WorkerEvent.HELLO)
        return block

    # -- moving chunks -----------------------------------------------------------------------
    def lend_output_room(self, port: str, shape: tuple[int, ...], dtype: np.dtype) -> np.ndarray | None:
        """The block's ``context.output_room``: room in the ring of the port's one link (see
        :meth:`Outlet.lend_room`), None when the port has no link or several."""
        outlets = self.outlets.get(port, [])
        if len(outlets) != 1:
            return None
        began = time.perf_counter()
        room = outlets[0].lend_room(shape, dtype)
        self.busy_seconds -= time.perf_counter() - began    # asked from the block's call: waiting is not its work
        if room is not None:
            self.lent_to.append(outlets[0])
        return room

    def emit(self, produced: Output | None) -> None:
        try:
            for port, chunks in (produced or {}).items():
                for chunk in chunks_of(chunks):
                    self.rows_out += chunk.count
                    outlets = self.outlets.get(port, [])
                    for outlet, picked in zip(outlets, column_major(chunk, outlets)):
                        outlet.send(chunk, picked=picked)
        finally:
            self.take_back_lent_room()

    def take_back_lent_room(self) -> None:
        """Room lent to the block for a chunk it did not send (see :meth:`lend_output_room`) goes back."""
        for outlet in self.lent_to:
            outlet.take_back_room()
        self.lent_to.clear()

    def wait_for_go(self) -> None:
        """The start barrier: a source produces nothing until every process of the flow has opened its
        links, so no sample is sent (or read from a pipe) before its consumers can take it."""
        while not self.poll_control() and not self.go and not self.stop:     # said go: on at once
            self.control.poll(50)

    def timed(self, call: Callable[[], Output | None]) -> Output | None:
        """Run one call into the block, adding its time to ``busy_seconds``."""
        began = time.perf_counter()
        try:
            return call()
        finally:
            self.busy_seconds += time.perf_counter() - began

    def run_source(self, block: Block) -> None:
        self.wait_for_go()
        block.begin()
        while not self.poll_control():
            produced = self.timed(block.produce)
            if produced is None:
                self.take_back_lent_room()
                break
            if self.first_rows_clock is None and produced:
                self.first_rows_clock = time.monotonic()
            self.emit(produced)
            self.flush_due_batches()
            self.maybe_stats()

    def take(self, inlet: Inlet) -> None:
        """Receive what ``inlet`` has, hand it to the block, pass on what the block made."""
        assert self.block is not None
        try:
            chunk = inlet.receive()
        except wire.WireError as error:
            raise RuntimeError(f"link {inlet.spec.label}: bad message: {error}") from None
        if chunk is not None and (chunk.count or chunk.dropped or chunk.discontinuity):
            self.rows_in += chunk.count
            if self.first_rows_clock is None and chunk.count:
                self.first_rows_clock = time.monotonic()
            self.emit(self.timed(partial(self.block.consume, inlet.port, chunk)))
            inlet.processed()

    def run_consumer(self, block: Block) -> None:
        poller = zmq.Poller()
        by_socket = {}
        for inlet in self.inlets:
            poller.register(inlet.sock, zmq.POLLIN)
            by_socket[inlet.sock] = inlet
        open_inlets = set(self.inlets)
        holding = False
        while open_inlets:
            if self.poll_control():
                return
            for sock, _ in poller.poll(BATCH_POLL_MS if holding else POLL_MS):
                inlet = by_socket[sock]
                self.take(inlet)
                if inlet.ended:
                    open_inlets.discard(inlet)
                    poller.unregister(sock)
            holding = self.flush_due_batches()
            self.maybe_stats()
        self.finish()

    def finish(self) -> None:
        """Every input has ended: let the block give what it still holds, and pass that on."""
        assert self.block is not None
        self.emit(self.timed(self.block.finish))

    def end_streams(self) -> None:
        """Send end of stream on every output."""
        assert self.block is not None
        for port, outs in self.outlets.items():
            final = self.block.end_index(port)
            for outlet in outs:
                outlet.end(final)

    @property
    def needs_release(self) -> bool:
        """Whether the block must keep its links open until released (an endpoint waits for
        acknowledgements instead)."""
        return any(not o.spec.bind for o in self.all_outlets())

    def run(self) -> None:
        block = self.build()
        if block.is_source:
            self.run_source(block)
        else:
            self.run_consumer(block)
        if not self.abort:
            self.end_streams()
            self.wait_for_release()

    def wait_for_release(self) -> None:
        """Keep the links open until the consumers have read everything (see the module doc)."""
        if not self.needs_release:
            return
        self.send_stats(WorkerEvent.ENDING)
        while not self.poll_control() and not self.released:
            self.control.poll(20)

    def close(self, event: WorkerEvent, *, message: str = "") -> WorkerEvent:
        """Close the block (flushing its files), send the last statistics, close its links. A block
        whose closing fails (its last data or its metadata not written) has failed: the event returned
        is then ERROR, with the reason. A block alone in its process closes the process's sockets too."""
        report: list[str] = []
        if self.block is not None:
            try:
                self.block.close()
            except Exception as error:
                reason = describe_failure(error)
                if event is not WorkerEvent.ERROR:
                    print(f"bandloom: block {self.name!r} failed while closing: {reason}", file=sys.stderr)
                    event, message = WorkerEvent.ERROR, reason
                else:
                    message = f"{message}; then closing failed: {reason}"
            try:
                report = list(self.block.report())
            except Exception as error:  # a report must not hide the run's own outcome
                report = [f"report failed: {describe_failure(error)}"]
        try:
            self.send_stats(event, report=report, message=message)
        except zmq.ZMQError:
            pass
        for inlet in self.inlets:
            inlet.close()
        for outlet in self.all_outlets():
            outlet.close(discard=event is not WorkerEvent.DONE)
        self.closed = event
        if len(self.process.workers) == 1:
            self.process.close()
        return event

    def fail(self, error: BaseException) -> WorkerEvent:
        """The block failed: say so on standard error and to the supervisor, and close it."""
        message = describe_failure(error)
        print(f"bandloom: block {self.name!r} failed: {message}", file=sys.stderr)
        if os.environ.get("BANDLOOM_DEBUG"):
            print(traceback.format_exc(), file=sys.stderr)
        return self.close(WorkerEvent.ERROR, message=message)


class WorkerProcess:
    """What the blocks of one worker process share: the ZeroMQ context, the supervisor's control and
    statistics sockets, and what the supervisor said to all (go, stop, abort). Usually one block; copies
    of a per-channel block with ``copies_per_process`` run several in one loop (:meth:`run_copies`), each
    with its own links, counters, statistics and failure."""

    def __init__(self, spec: WorkerSpec) -> None:
        self.spec = spec
        self.context = zmq.Context()
        self.control = self.context.socket(zmq.SUB)
        self.control.setsockopt(zmq.LINGER, 0)
        self.control.setsockopt(zmq.SUBSCRIBE, b"")
        self.control.connect(spec.control)
        self.stats_socket = self.context.socket(zmq.PUSH)
        self.stats_socket.setsockopt(zmq.LINGER, 5000)
        self.stats_socket.connect(spec.stats)
        self.go = False
        self.stop = False
        self.abort = False
        self.parent = os.getppid()
        self.workers: list[Worker] = []

    @property
    def parent_gone(self) -> bool:
        """The supervisor has died (this process was handed to another parent)."""
        return os.getppid() != self.parent

    def poll_control(self) -> bool:
        """Read what the supervisor said; True once the run is being aborted."""
        if self.parent_gone:
            self.abort = True          # the supervisor is gone: nobody will ever stop us
        while True:
            try:
                message = Control.decode(self.control.recv(zmq.NOBLOCK))
            except zmq.Again:
                break
            if message is None:
                continue
            for worker in self.workers:        # before the flags below change: a source hears its first stop
                worker.hear(message)
            if message.word is ControlWord.ABORT:
                self.abort = True
            elif message.word is ControlWord.GO:
                self.go = True
            elif message.word is ControlWord.STOP:
                self.stop = True
        return self.abort

    def run_copies(self) -> None:
        """Run every block of the process (copies of one per-channel block: consumers) in one loop. A block
        that fails is closed and reported (ERROR) alone; the others go on. Each block ends its streams
        when its inputs have ended, and closes once released."""
        workers = list(self.workers)
        live: list[Worker] = []
        for worker in workers:
            try:
                worker.build()
                live.append(worker)
            except Exception as error:
                worker.fail(error)
        poller = zmq.Poller()
        by_socket: dict[zmq.Socket, tuple[Worker, Inlet]] = {}
        open_inlets: dict[Worker, set[Inlet]] = {}
        for worker in live:
            open_inlets[worker] = set(worker.inlets)
            for inlet in worker.inlets:
                poller.register(inlet.sock, zmq.POLLIN)
                by_socket[inlet.sock] = (worker, inlet)
        ending: list[Worker] = []            # streams ended, waiting to be released

        def drop(worker: Worker) -> None:
            for inlet in open_inlets.pop(worker, set()):
                poller.unregister(inlet.sock)

        holding = False
        while open_inlets or ending:
            if self.poll_control():
                return
            for sock, _ in poller.poll(BATCH_POLL_MS if holding else POLL_MS):
                if sock not in by_socket:
                    continue
                worker, inlet = by_socket[sock]
                if worker not in open_inlets:
                    continue                   # failed earlier in this turn
                try:
                    worker.take(inlet)
                    if inlet.ended:
                        open_inlets[worker].discard(inlet)
                        poller.unregister(sock)
                        del by_socket[sock]
                    if not open_inlets[worker]:
                        del open_inlets[worker]
                        worker.finish()
                        worker.end_streams()
                        if worker.needs_release:
                            worker.send_stats(WorkerEvent.ENDING)
                            ending.append(worker)
                        else:
                            worker.close(WorkerEvent.DONE)
                except Aborted:
                    return
                except Exception as error:
                    drop(worker)
                    worker.fail(error)
            for worker in [w for w in ending if w.released]:
                ending.remove(worker)
                worker.close(WorkerEvent.DONE)
            holding = False
            for worker in open_inlets:
                holding = worker.flush_due_batches() or holding
                worker.maybe_stats()
            for worker in ending:
                worker.maybe_stats()

    def close(self) -> None:
        """Close the process's own sockets (after every block has closed)."""
        self.control.close()
        # the last statistics may wait a while for a busy supervisor, but not for one that is gone
        self.stats_socket.close(linger=0 if self.parent_gone else 5000)
        self.context.term()
        if self.parent_gone:
            remove_run_folder(self.spec)


def remove_run_folder(spec: WorkerSpec) -> None:
    """The supervisor died without cleaning up: remove the run's private folder (its sockets and
    specs), which is the folder of the control socket, if it is one of ours."""
    if not spec.control.startswith("ipc://"):
        return
    folder = Path(spec.control[len("ipc://"):]).parent
    if folder.name.startswith("bandloom-") and folder.parent == Path(tempfile.gettempdir()):
        shutil.rmtree(folder, ignore_errors=True)


def describe_failure(error: BaseException) -> str:
    """One line for a block's failure: the file and reason for OS errors, the text of value errors."""
    if isinstance(error, OSError) and error.filename:
        return f"{error.filename}: {error.strerror}"
    if isinstance(error, (ValueError, OSError)):
        return str(error)
    return f"{type(error).__name__}: {error}"


def main(argv: list[str] | None = None) -> int:
    """``python -m bandloom.runtime.worker SPEC.json``: run the process's block (or copies); 0 when done or
    aborted, 1 when a block failed."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    signal.signal(signal.SIGTERM, signal.SIG_IGN)
    if hasattr(signal, "SIGXFSZ"):
        signal.signal(signal.SIGXFSZ, signal.SIG_IGN)     # a file-size limit is a write error naming the file
    reuse_chunk_buffers()
    args = sys.argv[1:] if argv is None else argv
    specs = specs_from_json(Path(args[0]).read_text())
    # what ps and top show for this process (a worker forked by the launcher would show the launcher's line)
    names = specs[0].name if len(specs) == 1 else f"{specs[0].name}..{specs[-1].name}"
    setproctitle.setproctitle(f"bandloom worker {names} ({specs[0].type_name}) {args[0]}")
    if len(specs) > 1:
        return run_copies(specs)
    worker = Worker(specs[0])
    try:
        worker.run()
    except Aborted:
        return 1 if worker.close(WorkerEvent.ABORTED) is WorkerEvent.ERROR else 0
    except Exception as error:
        worker.fail(error)
        return 1
    return 1 if worker.close(WorkerEvent.ABORTED if worker.abort else WorkerEvent.DONE) is WorkerEvent.ERROR else 0


def run_copies(specs: list[WorkerSpec]) -> int:
    """Several copies of a per-channel block in this process (see :class:`WorkerProcess`)."""
    process = WorkerProcess(specs[0])
    workers = [Worker(spec, process) for spec in specs]
    try:
        process.run_copies()
    finally:
        for worker in workers:
            if worker.closed is None:
                worker.close(WorkerEvent.ABORTED if process.abort else WorkerEvent.DONE)
        process.close()
    return 1 if any(w.closed is WorkerEvent.ERROR for w in workers) else 0


if __name__ == "__main__":
    sys.exit(main())
