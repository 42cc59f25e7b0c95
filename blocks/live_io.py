"""Live input and piped output: IQ from standard input or a UDP port, samples to standard output.

A live source never stalls its input: a reader thread takes the input as it
comes into a bounded queue of buffers; when the flow downstream cannot keep
up and the queue is full, whole buffers are dropped. Every dropped sample is
counted and the next chunk starts at a later absolute index, which the link
marks as a discontinuity with the number of samples missing.
"""

from __future__ import annotations

import os
import queue
import socket
import sys
import threading
import time
from typing import Any

from .block import Block, BlockContext, BlockError, Chunk, Output, Param, Port, StreamInfo
from .sample_formats import COMPLEX_FORMATS, FORMATS

__all__ = ["StdinReader", "StdoutWriter", "UDPReader"]

LIVE_PARAMS = (
    Param("format", "choice", "sample format", default="cf32", choices=COMPLEX_FORMATS),
    Param("byte_order", "choice", "byte order of multi-byte formats", default="little", choices=("little", "big")),
    Param("sample_rate", "quantity", "sample rate of the stream", unit="Hz", minimum=1e-9),
    Param("centre_frequency", "quantity", "RF frequency at 0 Hz", default=0.0, unit="Hz"),
    Param("queue", "int", "buffers held while downstream is busy; beyond this, buffers are dropped",
          default=16, minimum=1, maximum=100000),
)


class _LiveSource(Block):
    is_source = True
    outputs = (Port("samples", "samples", "IQ samples, full scale 1.0"),)

    def __init__(self, params: dict[str, Any], context: BlockContext) -> None:
        super().__init__(params, context)
        self.format = FORMATS[params["format"]]
        self.sample_bytes = self.format.bytes_per_sample
        self.next_index = 0          # absolute index of the next sample read (reader thread)
        self.dropped_samples = 0
        self.dropped_buffers = 0
        self.received = 0
        self.ended = threading.Event()

    def output_streams(self, inputs: dict[str, StreamInfo]) -> dict[str, StreamInfo]:
        return {"samples": StreamInfo("samples", "cf32", self.params["sample_rate"], self.params["centre_frequency"])}

    def _read_loop(self) -> None:
        raise NotImplementedError

    def start(self, inputs: dict[str, StreamInfo]) -> None:
        self.buffers: queue.Queue[tuple[int, bytes]] = queue.Queue(maxsize=self.params["queue"])
        self.thread = threading.Thread(target=self._read_loop, daemon=True)
        self.thread.start()

    def _offer(self, raw: bytes) -> None:
        n = len(raw) // self.sample_bytes
        if n == 0:
            return
        item = (self.next_index, raw[:n * self.sample_bytes])
        self.next_index += n
        try:
            self.buffers.put_nowait(item)
        except queue.Full:
            self.dropped_samples += n
            self.dropped_buffers += 1

    def produce(self) -> Output | None:
        while True:
            try:
                index, raw = self.buffers.get(timeout=0.1)
            except queue.Empty:
                if self.stopping or (self.ended.is_set() and self.buffers.empty()):
                    return None
                return {}
            data = self.format.decode(raw, self.params["byte_order"])
            self.received += len(data)
            return {"samples": [Chunk(data, index)]}

    def end_index(self, port: str) -> int:
        return self.next_index

    def report(self) -> list[str]:
        return [f"took {self.received} samples; dropped {self.dropped_samples} "
                f"samples in {self.dropped_buffers} buffers because downstream was busy"]


class StdinReader(_LiveSource):
    uses_stdin = True
    type_name = "stdin-reader"
    summary = "Read raw IQ from standard input, as a receiver program pipes it (never stalls the pipe)."
    parameters = LIVE_PARAMS + (
        Param("buffer_size", "int", "samples per buffer read", default=16384, minimum=1, maximum=1 << 22),
    )

    def _read_loop(self) -> None:
        size = self.params["buffer_size"] * self.sample_bytes
        stream = sys.stdin.buffer
        leftover = b""
        try:
            while not self.stopping:
                raw = stream.read1(size - len(leftover)) if hasattr(stream, "read1") else stream.read(size)
                if not raw:
                    break
                raw = leftover + raw
                whole = len(raw) - len(raw) % self.sample_bytes
                self._offer(raw[:whole])
                leftover = raw[whole:]
        finally:
            self.ended.set()


class UDPReader(_LiveSource):
    type_name = "udp-reader"
    summary = "Receive raw IQ in UDP datagrams (optionally skipping a fixed header in each)."
    parameters = LIVE_PARAMS + (
        Param("address", "str", "local address to listen on", default="127.0.0.1"),
        Param("port", "int", "UDP port", minimum=1, maximum=65535),
        Param("header_bytes", "int", "bytes to skip at the start of each datagram", default=0, minimum=0),
        Param("idle_timeout", "quantity", "end the stream after this long without datagrams, counted from "
              "the first one (0 = never)", default=0.0, unit="s", minimum=0.0),
    )

    def __init__(self, params: dict[str, Any], context: BlockContext) -> None:
        super().__init__(params, context)
        self.sock: socket.socket | None = None

    def start(self, inputs: dict[str, StreamInfo]) -> None:
        self.sock = socket.socket(socket.AF_INET6 if ":" in self.params["address"] else socket.AF_INET,
                                  socket.SOCK_DGRAM)
        self.sock.setsockopt(socket.SOL_SOCKET, socket.SO_RCVBUF, 1 << 22)
        try:
            self.sock.bind((self.params["address"], self.params["port"]))
        except OSError as error:
            raise BlockError(f"cannot listen on udp {self.params['address']}:{self.params['port']}: "
                             f"{error.strerror}", param="port") from None
        self.sock.settimeout(0.2)
        super().start(inputs)

    def _read_loop(self) -> None:
        assert self.sock is not None
        skip = self.params["header_bytes"]
        idle = self.params["idle_timeout"]
        last = None
        try:
            while not self.stopping:
                try:
                    datagram = self.sock.recv(65536)
                except socket.timeout:
                    if idle and last is not None and time.monotonic() - last > idle:
                        break
                    continue
                last = time.monotonic()
                self._offer(datagram[skip:])
        finally:
            self.ended.set()

    def close(self) -> None:
        if self.sock:
            self.sock.close()


class StdoutWriter(Block):
    uses_stdout = True
    type_name = "stdout-writer"
    summary = "Write one stream's raw samples to standard output, to pipe a channel into another program."
    parameters = (Param("format", "choice", "an IQ format (cf32, ci16, ...) for IQ, f32 or s16 for audio; "
                        "'native' writes the stream's own cf32 or f32", default="native",
                        choices=("native",) + tuple(FORMATS)),)
    inputs = (Port("samples", "samples", "IQ or audio", sample_types=("cf32", "f32")),)

    def __init__(self, params: dict[str, Any], context: BlockContext) -> None:
        super().__init__(params, context)
        self.written = 0
        self.closed_pipe = False

    def output_streams(self, inputs: dict[str, StreamInfo]) -> dict[str, StreamInfo]:
        kind = inputs["samples"].sample_type
        fmt = self.params["format"]
        if fmt != "native" and FORMATS[fmt].sample_type != kind:
            raise BlockError(f"format = \"{fmt}\" does not fit a {kind} stream", param="format")
        return {}

    def start(self, inputs: dict[str, StreamInfo]) -> None:
        self.fd = sys.stdout.fileno()
        self.format = FORMATS[inputs["samples"].sample_type if self.params["format"] == "native"
                              else self.params["format"]]

    def consume(self, port: str, chunk: Chunk) -> Output:
        if self.closed_pipe:
            return {}
        data = self.format.encode(chunk.with_gap_filled())
        view = memoryview(data.tobytes() if not data.flags.c_contiguous else data.data).cast("B")
        try:
            while len(view):
                done = os.write(self.fd, view)
                view = view[done:]
        except BrokenPipeError:
            self.closed_pipe = True
            return {}
        self.written += chunk.count
        return {}

    def report(self) -> list[str]:
        note = "; the reading program closed the pipe early" if self.closed_pipe else ""
        return [f"wrote {self.written} samples to standard output{note}"]
