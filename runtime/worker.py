"""One block's process: ``python -m bandloom.runtime.worker SPEC.json``.

The supervisor starts one worker per block instance. A worker builds its
block, binds its inputs, connects its outputs, then moves chunks until every
input has ended (or, for a source, until the block has nothing more or a stop
is requested), sends end of stream downstream, closes the block (flushing
files) and exits 0. It ignores Ctrl-C itself: the supervisor coordinates the
stop, so that sources end their streams and everything downstream drains.

Control messages from the supervisor (PUB/SUB): ``stop`` — sources end their
streams; ``abort`` — close everything now; ``release NAME`` — every consumer
of block NAME has read its end of stream, so NAME may close its links.
Statistics go back to the supervisor (PUSH/PULL) twice a second and at the end.

Why the release: ZeroMQ counts a message as sent once it is written to the
connection. If the sender then closes while the receiver, held back by its
high-water mark, has not yet read the rest of the connection, the receiver
drops what is left when it sees the connection close. So a block that has
sent its end of stream keeps its connections open until the supervisor says
its consumers have finished.
"""

from __future__ import annotations

import json
import os
import signal
import sys
import time
import traceback
from dataclasses import asdict
from pathlib import Path

import msgpack
import zmq

from bandloom.blocks.block import BlockContext, StreamInfo

from . import wire
from ._memory import reuse_chunk_buffers
from .links import Aborted, Inlet, Outlet
from .plugins import load_registry

STATS_INTERVAL = 0.5


def stream_to_dict(stream):
    return asdict(stream)


def stream_from_dict(data):
    data = dict(data)
    for key in ("channels", "channel_frequencies"):
        data[key] = tuple(data.get(key) or ())
    return StreamInfo(**data)


class Worker:
    def __init__(self, spec):
        self.spec = spec
        self.name = spec["name"]
        self.context = zmq.Context()
        self.control = self.context.socket(zmq.SUB)
        self.control.setsockopt(zmq.LINGER, 0)
        self.control.setsockopt(zmq.SUBSCRIBE, b"")
        self.control.connect(spec["control"])
        self.stats_socket = self.context.socket(zmq.PUSH)
        self.stats_socket.setsockopt(zmq.LINGER, 5000)
        self.stats_socket.connect(spec["stats"])
        self.stop = False
        self.abort = False
        self.released = False
        self.inlets = []
        self.outlets = {}
        self.block = None
        self.last_stats = 0.0
        self.rows_in = 0
        self.rows_out = 0
        self.started = time.monotonic()
        self.parent = os.getppid()

    # -- control and statistics -------------------------------------------------------------
    def poll_control(self):
        if os.getppid() != self.parent:
            self.abort = True          # the supervisor is gone: nobody will ever stop us
        while True:
            try:
                message = self.control.recv(zmq.NOBLOCK)
            except zmq.Again:
                break
            if message == b"abort":
                self.abort = True
            elif message == b"release " + self.name.encode():
                self.released = True
            elif message == b"stop":
                if not self.stop and self.block is not None and self.block.is_source:
                    self.block.stop_requested()
                self.stop = True
        return self.abort

    def send_stats(self, event="stats", **extra):
        message = {
            "event": event, "block": self.name, "pid": os.getpid(), "time": time.monotonic() - self.started,
            "rows_in": self.rows_in, "rows_out": self.rows_out,
            "inputs": {str(i.id): i.stats() for i in self.inlets},
            "outputs": {str(o.id): o.stats() for outs in self.outlets.values() for o in outs},
        }
        progress = self.block.progress() if self.block is not None and self.block.is_source else None
        if progress:
            message["progress"] = [int(progress[0]), int(progress[1])]
        message.update(extra)
        self.stats_socket.send(msgpack.packb(message, use_bin_type=True))
        self.last_stats = time.monotonic()

    def maybe_stats(self):
        if time.monotonic() - self.last_stats >= STATS_INTERVAL:
            self.poll_control()
            self.send_stats()

    # -- set up ------------------------------------------------------------------------------
    def build(self):
        spec = self.spec
        registry = load_registry(only=spec["type"])
        cls = registry.types.get(spec["type"])
        if cls is None:
            raise RuntimeError(f"block type {spec['type']!r} is not installed here")
        context = BlockContext(self.name, Path(spec["flow_path"]), Path(spec["output_dir"]),
                               spec.get("placeholders", {}))
        self.block = cls(spec["params"], context)
        inputs = {port: stream_from_dict(i["stream"]) for port, i in spec["inputs"].items()}
        self.block.output_streams(dict(inputs))          # validates again, in this process
        for port, i in spec["inputs"].items():
            i = dict(i, stream=inputs[port])
            self.inlets.append(Inlet(self.context, i, port))
        for port, outs in spec["outputs"].items():
            self.outlets[port] = [Outlet(self.context, dict(o, stream=stream_from_dict(o["stream"])),
                                         self.poll_control) for o in outs]
        self.block.start(inputs)
        self.send_stats("hello")

    # -- moving chunks -----------------------------------------------------------------------
    def emit(self, produced):
        for port, chunks in (produced or {}).items():
            for chunk in chunks if isinstance(chunks, list) else [chunks]:
                self.rows_out += chunk.count
                for outlet in self.outlets.get(port, []):
                    outlet.send(chunk)

    def run_source(self):
        while not self.poll_control():
            produced = self.block.produce()
            if produced is None:
                break
            self.emit(produced)
            self.maybe_stats()

    def run_consumer(self):
        poller = zmq.Poller()
        by_socket = {}
        for inlet in self.inlets:
            poller.register(inlet.sock, zmq.POLLIN)
            by_socket[inlet.sock] = inlet
        open_inlets = set(self.inlets)
        while open_inlets:
            if self.poll_control():
                return
            for sock, _ in poller.poll(200):
                inlet = by_socket[sock]
                try:
                    chunk = inlet.receive()
                except wire.WireError as error:
                    raise RuntimeError(f"link {inlet.spec['label']}: bad message: {error}") from None
                if chunk is not None:
                    self.rows_in += chunk.count
                    self.emit(self.block.consume(inlet.port, chunk))
                if inlet.ended:
                    open_inlets.discard(inlet)
                    poller.unregister(sock)
            self.maybe_stats()
        self.emit(self.block.finish())

    def run(self):
        self.build()
        if self.block.is_source:
            self.run_source()
        else:
            self.run_consumer()
        if not self.abort:
            for port, outs in self.outlets.items():
                final = self.block.end_index(port)
                for outlet in outs:
                    outlet.end(final)
            self.wait_for_release()

    def wait_for_release(self):
        """Keep the links open until the consumers have read everything (see the module doc)."""
        if not any(o.spec.get("endpoint", "").startswith("ipc://") and not o.spec.get("bind")
                   for outs in self.outlets.values() for o in outs):
            return
        self.send_stats("ending")
        while not self.released and not self.poll_control():
            time.sleep(0.02)

    def close(self, event, **extra):
        report = []
        if self.block is not None:
            try:
                self.block.close()
                report = list(self.block.report())
            except Exception as error:  # closing must not hide the run's own outcome
                report = [f"closing failed: {error}"]
        try:
            self.send_stats(event, report=report, **extra)
        except zmq.ZMQError:
            pass
        for inlet in self.inlets:
            inlet.close()
        for outs in self.outlets.values():
            for outlet in outs:
                outlet.close(discard=event != "done")
        self.control.close()
        self.stats_socket.close(linger=5000)
        self.context.term()


def main():
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    signal.signal(signal.SIGTERM, signal.SIG_IGN)
    reuse_chunk_buffers()
    spec = json.loads(Path(sys.argv[1]).read_text())
    worker = Worker(spec)
    try:
        worker.run()
    except Aborted:
        worker.close("aborted")
        return 0
    except Exception as error:
        if isinstance(error, OSError) and error.filename:
            message = f"{error.filename}: {error.strerror}"
        elif isinstance(error, (ValueError, OSError)):
            message = str(error)
        else:
            message = f"{type(error).__name__}: {error}"
        detail = traceback.format_exc() if os.environ.get("BANDLOOM_DEBUG") else ""
        print(f"bandloom: block {worker.name!r} failed: {message}", file=sys.stderr)
        if detail:
            print(detail, file=sys.stderr)
        worker.close("error", message=message)
        return 1
    worker.close("aborted" if worker.abort else "done")
    return 0


if __name__ == "__main__":
    sys.exit(main())
