"""Live input and piped output: IQ from standard input or a UDP port, samples to standard output.

A live source reads its input in a thread of its own into a buffer stated in
seconds of samples (``buffer``; memory = seconds x sample rate x bytes per
sample, at most :data:`MAX_BUFFER_BYTES`). Reading starts only when every
process of the flow is ready (the start barrier), so nothing is read before
it can be delivered. When the flow downstream cannot keep up and the buffer
is full:

* ``stdin-reader`` with ``when_full = "wait"`` (the default) stops reading,
  so the pipe's writer waits, as it would for any Unix filter: a piped
  recording loses nothing;
* with ``when_full = "drop"`` (for a receiver program that must never be
  stalled) whole buffers are dropped; every dropped sample is counted and
  the next chunk starts at a later absolute index, which the link marks as a
  discontinuity with the number of samples missing;
* ``udp-reader`` cannot hold a sender back: it drops like ``"drop"``, and also
  counts what the kernel dropped before the datagrams reached it
  (``SO_RXQ_OVFL``) and datagrams it could not use (shorter than the header,
  or not a whole number of samples).

Every loss is reported to the run's verdict through :meth:`Block.losses`.
"""

from __future__ import annotations

import math
import os
import queue
import socket
import struct
import sys
import threading
import time
from typing import Any

from .block import Block, BlockContext, BlockError, Chunk, Loss, Output, Param, Port, StreamInfo
from .sample_formats import COMPLEX_FORMATS, FORMATS

__all__ = ["MAX_BUFFER_BYTES", "StdinReader", "StdoutWriter", "UDPReader"]

MAX_BUFFER_BYTES = 1 << 30
UDP_PAYLOAD_BYTES = 65507          # the largest UDP payload over IPv4 (RFC 768 length less the headers)
SO_RXQ_OVFL = getattr(socket, "SO_RXQ_OVFL", 40)     # Linux: count of datagrams the kernel dropped

LIVE_PARAMS = (
    Param("format", "choice", "sample format", default="cf32", choices=COMPLEX_FORMATS),
    Param("byte_order", "choice", "byte order of multi-byte formats", default="little", choices=("little", "big")),
    Param("sample_rate", "quantity", "sample rate of the stream", unit="Hz", minimum=1e-9),
    Param("centre_frequency", "quantity", "RF frequency at 0 Hz", default=0.0, unit="Hz"),
    Param("buffer", "quantity", "input held while downstream is busy, as time at the sample rate "
          f"(memory: buffer x rate x bytes per sample, at most {MAX_BUFFER_BYTES >> 20} MiB)", default=2.0, unit="s",
          minimum=1e-3, maximum=3600.0),
)


class _LiveSource(Block):
    is_source = True
    outputs = (Port("samples", "samples", "IQ samples, full scale 1.0"),)
    read_samples = 16384             # samples per buffer read; subclasses may take it from a parameter

    def __init__(self, params: dict[str, Any], context: BlockContext) -> None:
        super().__init__(params, context)
        self.format = FORMATS[params["format"]]
        self.sample_bytes = self.format.bytes_per_sample
        self.next_index = 0          # absolute index of the next sample read (reader thread)
        self.dropped_samples = 0
        self.dropped_buffers = 0
        self.received = 0
        self.waits = 0               # times the reader held its input back (when_full = "wait")
        self.ended = threading.Event()
        self.thread: threading.Thread | None = None

    @property
    def dropping(self) -> bool:
        """Whether a full buffer drops input (else the reader waits)."""
        return True

    @property
    def drop_declared(self) -> bool:
        """Whether the flow chose dropping (then its drops are accepted loss, still reported)."""
        return False

    def buffers_held(self) -> int:
        """How many read buffers the ``buffer`` parameter's seconds come to (at least two)."""
        samples = self.params["buffer"] * self.params["sample_rate"]
        return max(2, math.ceil(samples / self.read_samples))

    def output_streams(self, inputs: dict[str, StreamInfo]) -> dict[str, StreamInfo]:
        held = self.buffers_held() * self.read_samples * self.sample_bytes
        if held > MAX_BUFFER_BYTES:
            raise BlockError(f"buffer = {self.params['buffer']:g} s at {self.params['sample_rate']:g} samples/s "
                             f"of {self.params['format']} needs {held >> 20} MiB, more than the "
                             f"{MAX_BUFFER_BYTES >> 20} MiB a live source may hold; shorten it", param="buffer")
        return {"samples": StreamInfo("samples", "cf32", self.params["sample_rate"], self.params["centre_frequency"])}

    def _read_loop(self) -> None:
        raise NotImplementedError

    def start(self, inputs: dict[str, StreamInfo]) -> None:
        self.buffers: queue.Queue[tuple[int, bytes]] = queue.Queue(maxsize=self.buffers_held())

    def begin(self) -> None:
        self.thread = threading.Thread(target=self._read_loop, daemon=True)
        self.thread.start()

    def _offer(self, raw: bytes) -> None:
        n = len(raw) // self.sample_bytes
        if n == 0:
            return
        item = (self.next_index, raw[:n * self.sample_bytes])
        self.next_index += n
        if self.dropping:
            try:
                self.buffers.put_nowait(item)
            except queue.Full:
                self.dropped_samples += n
                self.dropped_buffers += 1
            return
        while not self.stopping:
            try:
                self.buffers.put(item, timeout=0.1)
                return
            except queue.Full:
                self.waits += 1

    def produce(self) -> Output | None:
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

    def losses(self) -> list[Loss]:
        if not self.dropped_samples:
            return []
        return [Loss(self.dropped_samples, f"{self.dropped_buffers} buffers dropped because downstream was busy "
                                           f"(buffer {self.params['buffer']:g} s)", accepted=self.drop_declared)]

    def report(self) -> list[str]:
        return [f"took {self.received} samples; dropped {self.dropped_samples} "
                f"samples in {self.dropped_buffers} buffers because downstream was busy"]


class StdinReader(_LiveSource):
    uses_stdin = True
    type_name = "stdin-reader"
    summary = "Read raw IQ from standard input, as a receiver program or a recording is piped in."
    parameters = LIVE_PARAMS + (
        Param("when_full", "choice", "when the buffer is full: 'wait' holds the pipe (its writer waits; nothing "
              "is lost), 'drop' drops whole buffers, counted (for a receiver that must never be stalled)",
              default="wait", choices=("wait", "drop")),
        Param("buffer_size", "int", "samples per buffer read", default=16384, minimum=1, maximum=1 << 22),
    )

    def __init__(self, params: dict[str, Any], context: BlockContext) -> None:
        super().__init__(params, context)
        self.read_samples = params["buffer_size"]

    @property
    def dropping(self) -> bool:
        return self.params["when_full"] == "drop"

    @property
    def drop_declared(self) -> bool:
        return self.dropping

    def _read_loop(self) -> None:
        size = self.read_samples * self.sample_bytes
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
            self.partial_tail = len(leftover)
        finally:
            self.ended.set()

    partial_tail = 0                 # bytes of a last, incomplete sample when the pipe closed

    def losses(self) -> list[Loss]:
        tail = [Loss(1, f"the input ended inside a sample ({self.partial_tail} of {self.sample_bytes} bytes)",
                     accepted=False)] if self.partial_tail else []
        return super().losses() + tail


class UDPReader(_LiveSource):
    type_name = "udp-reader"
    summary = "Receive raw IQ in UDP datagrams (optionally skipping a fixed header in each)."
    parameters = LIVE_PARAMS + (
        Param("address", "str", "local address to listen on", default="127.0.0.1"),
        Param("port", "int", "UDP port", minimum=1, maximum=65535),
        Param("header_bytes", "int", "bytes to skip at the start of each datagram", default=0, minimum=0,
              maximum=UDP_PAYLOAD_BYTES),
        Param("socket_buffer", "int", "bytes the kernel holds for the socket (SO_RCVBUF)", default=1 << 22,
              minimum=4096, maximum=1 << 30),
        Param("idle_timeout", "quantity", "end the stream after this long without datagrams, counted from "
              "the first one (0 = never)", default=0.0, unit="s", minimum=0.0),
    )

    def __init__(self, params: dict[str, Any], context: BlockContext) -> None:
        super().__init__(params, context)
        self.sock: socket.socket | None = None
        self.kernel_dropped = 0          # datagrams the kernel dropped (its counter, SO_RXQ_OVFL)
        self.kernel_dropped_samples = 0  # the same, in samples (each taken as large as the next one received)
        self.unusable = 0                # datagrams shorter than the header, or not whole samples
        self.unusable_bytes = 0

    def output_streams(self, inputs: dict[str, StreamInfo]) -> dict[str, StreamInfo]:
        room = UDP_PAYLOAD_BYTES - self.params["header_bytes"]
        if room < self.sample_bytes:
            raise BlockError(f"header_bytes = {self.params['header_bytes']} leaves {max(0, room)} bytes of the largest "
                             f"UDP datagram ({UDP_PAYLOAD_BYTES} bytes), less than one {self.params['format']} sample "
                             f"({self.sample_bytes} bytes): every datagram would be discarded", param="header_bytes")
        return super().output_streams(inputs)

    def start(self, inputs: dict[str, StreamInfo]) -> None:
        self.sock = socket.socket(socket.AF_INET6 if ":" in self.params["address"] else socket.AF_INET,
                                  socket.SOCK_DGRAM)
        self.sock.setsockopt(socket.SOL_SOCKET, socket.SO_RCVBUF, self.params["socket_buffer"])
        try:
            self.sock.setsockopt(socket.SOL_SOCKET, SO_RXQ_OVFL, 1)
        except OSError:
            pass                         # not Linux: kernel drops cannot be counted (said in the report)
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
                    datagram, ancillary, _, _ = self.sock.recvmsg(65536, socket.CMSG_SPACE(4))
                except socket.timeout:
                    if idle and last is not None and time.monotonic() - last > idle:
                        break
                    continue
                last = time.monotonic()
                payload = datagram[skip:]
                whole = len(payload) - len(payload) % self.sample_bytes
                if len(datagram) <= skip or whole != len(payload):
                    self.unusable += 1
                    self.unusable_bytes += len(payload) - whole if len(datagram) > skip else len(datagram)
                self._count_kernel_drops(ancillary, whole // self.sample_bytes)
                self._offer(payload[:whole])
        finally:
            self.ended.set()

    def _count_kernel_drops(self, ancillary: list[tuple[int, int, bytes]], samples: int) -> None:
        for level, kind, data in ancillary:
            if level == socket.SOL_SOCKET and kind == SO_RXQ_OVFL and len(data) >= 4:
                total = struct.unpack("=I", data[:4])[0]
                new = total - self.kernel_dropped
                if new > 0:
                    self.kernel_dropped = total
                    self.kernel_dropped_samples += new * samples
                    self.next_index += new * samples       # keep absolute time: the gap is flagged downstream

    def losses(self) -> list[Loss]:
        lost = super().losses()
        if self.kernel_dropped:
            lost.append(Loss(self.kernel_dropped_samples, f"{self.kernel_dropped} datagrams dropped by the kernel "
                             f"before they were read (samples estimated from the datagrams around them)",
                             accepted=False))
        if self.unusable:
            lost.append(Loss(-(-self.unusable_bytes // self.sample_bytes), f"{self.unusable} datagrams no longer "
                             f"than header_bytes or not whole samples ({self.unusable_bytes} bytes left unused)",
                             accepted=False))
        return lost

    def report(self) -> list[str]:
        lines = super().report()
        if self.kernel_dropped or self.unusable:
            lines.append(f"the kernel dropped {self.kernel_dropped} datagrams; {self.unusable} datagrams were "
                         f"unusable")
        return lines

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
        self.zero_filled = 0          # zero samples written where input was missing (a pipe cannot mark a gap)
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
        self.zero_filled += chunk.dropped
        return {}

    def report(self) -> list[str]:
        note = "; the reading program closed the pipe early" if self.closed_pipe else ""
        gaps = f" and {self.zero_filled} zeros for missing input" if self.zero_filled else ""
        return [f"wrote {self.written} samples{gaps} to standard output{note}"]
