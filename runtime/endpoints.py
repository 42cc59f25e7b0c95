"""Endpoints: a block output offered to outside programs, one consumer at a time, nothing lost uncounted.

The protocol is in docs/wire.md ("Endpoints"). In short: the block binds a
ZeroMQ ROUTER socket; a consumer connects a DEALER socket and sends requests
(``credit``: how many more messages it can take; ``ack``: the ``seq`` of the
last message it has processed). The endpoint sends a message only against
credit, keeps every message until it is acknowledged, and counts as
delivered only what was acknowledged.

* One consumer at a time: the first consumer to ask is attached; another one
  that asks while it is still connected gets a message with the *refused*
  flag and a reason, and nothing else.
* A consumer that leaves (says ``bye``, or its connection closes) is
  detached; what it had not acknowledged is sent again, first, to the next
  consumer, so a consumer that reconnects loses nothing. Messages keep their
  ``seq`` and ``first_index``: a consumer that may see a message twice after a
  reconnect knows it by its index.
* While no consumer takes messages, the endpoint holds ``queue`` of them and
  then waits (lossless, the default) or, with ``when_full = "drop"``, drops
  and counts them; the next message sent carries the gap (``dropped``), so a
  late consumer's first message says at which absolute index it starts and
  how many rows it missed.
* End of stream is delivered like any message and must be acknowledged; the
  block waits for that (or for the run to be stopped, when what is left is
  counted as not delivered).

Memory: at most ``queue`` messages waiting plus ``queue`` sent and not yet
acknowledged (a consumer's credit is capped at ``queue``).
"""

from __future__ import annotations

import time
from collections import deque
from collections.abc import Callable
from dataclasses import dataclass, replace

import zmq

from . import wire
from .control import OutletStats
from .links import POLL_MS, Aborted, Outlet, open_socket, recv_monitor_event, secure_server
from .worker_spec import LinkSpec

__all__ = ["EndpointOutlet"]


@dataclass
class _Message:
    seq: int
    rows: int
    frames: list


class EndpointOutlet(Outlet):
    """The sending end of an endpoint link (see module doc); the same interface as :class:`Outlet`."""

    def __init__(self, context: zmq.Context, spec: LinkSpec, should_abort: Callable[[], bool]) -> None:
        self.consumer: bytes | None = None
        self.last_consumer: bytes | None = None
        self.credit = 0
        self.waiting: deque[_Message] = deque()      # not yet sent to the attached consumer
        self.unacked: deque[_Message] = deque()      # sent to it, not yet acknowledged
        self.connections = 0
        self.delivered_rows = 0
        self.consumers = 0
        self.resent_messages = 0
        self.refused = 0
        self.bad_requests = 0
        super().__init__(context, spec, should_abort)     # batches only for a block on another host (latency)

    def _open(self, context: zmq.Context, spec: LinkSpec) -> None:
        keys = spec.keys

        def prepare(sock: zmq.Socket) -> object:
            sock.setsockopt(zmq.ROUTER_MANDATORY, 1)      # a send to a consumer that is gone fails, not vanishes
            sock.setsockopt(zmq.ROUTER_HANDOVER, 1)       # a consumer that reconnects under its id takes over
            sock.setsockopt(zmq.SNDHWM, spec.queue + 2)   # credit keeps what is outstanding below this
            sock.setsockopt(zmq.RCVHWM, 1000)             # requests are tiny: never hold a consumer's back
            return secure_server(sock, keys, context) if keys else None

        self.sock, self.authenticator = open_socket(context, zmq.ROUTER, spec, bind=True, prepare=prepare)
        self.sock.setsockopt(zmq.MAXMSGSIZE, wire.REQUEST_LIMIT + 64)
        self.monitor = self.sock.get_monitor_socket(zmq.EVENT_ACCEPTED | zmq.EVENT_DISCONNECTED)

    # -- the consumer ------------------------------------------------------------------------------
    def _attach(self, identity: bytes) -> None:
        if identity != self.last_consumer:          # the same one back after a detach is not a new consumer
            self.consumers += 1
        self.consumer = self.last_consumer = identity
        self.credit = 0

    def _detach(self) -> None:
        """The consumer is gone: what it did not acknowledge goes first to the next one."""
        self.resent_messages += len(self.unacked)
        self.waiting.extendleft(reversed(self.unacked))
        self.unacked.clear()
        self.consumer, self.credit = None, 0

    def _refuse(self, identity: bytes, reason: str) -> None:
        self.refused += 1
        header = self._header.encode(seq=0, first_index=0, count=0, flags=wire.FLAG_REFUSED, reason=reason)
        try:
            self.sock.send_multipart([identity, header, b""], flags=zmq.NOBLOCK)
        except zmq.ZMQError:
            pass

    def _acknowledge(self, seq: int) -> None:
        """Everything up to ``seq`` was processed: delivered. (After a detach that came too early, what the
        consumer acknowledges may already be waiting to be sent again: it is not sent again.)"""
        while self.unacked and self.unacked[0].seq <= seq:
            self.delivered_rows += self.unacked.popleft().rows
        while self.waiting and self.waiting[0].seq <= seq:
            self.delivered_rows += self.waiting.popleft().rows
            self.resent_messages -= 1

    def _service(self, timeout_ms: int) -> None:
        """Read connection events, then consumers' requests (waiting up to ``timeout_ms`` for either); a
        consumer whose connection closed is detached only after what it said before going was read."""
        poller = zmq.Poller()
        poller.register(self.sock, zmq.POLLIN)
        poller.register(self.monitor, zmq.POLLIN)
        poller.poll(timeout_ms)
        dropped = False
        while self.monitor.poll(0):
            event = recv_monitor_event(self.monitor)["event"]
            self.connections = max(0, self.connections + (1 if event == zmq.EVENT_ACCEPTED else -1))
            dropped = dropped or event == zmq.EVENT_DISCONNECTED
        self._read_requests()
        # Only a connection seen to close detaches: a consumer's first request can be read before the
        # monitor reports its connection, and must not be taken as coming from nobody.
        if dropped and self.connections == 0 and self.consumer is not None:
            self._detach()

    def _read_requests(self) -> None:
        while True:
            try:
                frames = self.sock.recv_multipart(zmq.NOBLOCK)
            except zmq.Again:
                return
            if len(frames) != 2:
                self.bad_requests += 1
                continue
            identity, raw = frames
            try:
                request = wire.decode_request(raw)
            except wire.WireError as error:
                self.bad_requests += 1
                self._refuse(identity, f"bad request: {error}")
                continue
            if identity != self.consumer:
                if self.consumer is not None and self.connections > 1:
                    self._refuse(identity, "another consumer is attached to this endpoint; one at a time")
                    continue
                if self.consumer is not None:
                    self._detach()                      # its connection is gone: this one takes over
                self._attach(identity)
            if request.ack is not None:
                self._acknowledge(request.ack)
            self.credit = min(self.credit + request.credit, self.spec.queue)
            if request.bye:
                self._detach()

    def _pump(self) -> None:
        """Send what is waiting, as far as the attached consumer's credit goes."""
        while self.consumer is not None and self.credit > 0 and self.waiting:
            message = self.waiting[0]
            try:
                self.sock.send_multipart([self.consumer, *message.frames], copy=False, flags=zmq.NOBLOCK)
            except zmq.Again:
                return
            except zmq.ZMQError as error:
                if error.errno == zmq.EHOSTUNREACH:
                    self._detach()
                    return
                raise
            self.waiting.popleft()
            self.unacked.append(message)
            self.credit -= 1

    def _wait_a_turn(self) -> None:
        started = time.monotonic()
        self._service(POLL_MS)
        self._pump()
        self.blocked_seconds += time.monotonic() - started
        if self.should_abort():
            raise Aborted()

    # -- the Outlet interface ----------------------------------------------------------------------
    def _send(self, frames: list, *, droppable: bool, seq: int, rows: int) -> bool:
        self._service(0)
        self._pump()
        if droppable and len(self.waiting) >= self.spec.queue:
            return False
        self.waiting.append(_Message(seq, rows, frames))
        self._pump()
        while len(self.waiting) > self.spec.queue and self.attached:     # (detached: its consumer is left down)
            self._wait_a_turn()
        return True

    def end(self, final_index: int | None = None) -> None:
        """Send end of stream and wait until a consumer has acknowledged everything, end included (unless the
        consumer, a block on another host, is left down: what it did not acknowledge is counted in flight)."""
        super().end(final_index)
        while (self.waiting or self.unacked) and self.attached:
            self._wait_a_turn()

    def stats(self) -> OutletStats:
        return replace(super().stats(), delivered_rows=self.delivered_rows, consumers=self.consumers,
                       resent_messages=self.resent_messages, refused=self.refused)

    def close(self, *, discard: bool = False) -> None:
        self.sock.disable_monitor()
        self.monitor.close(linger=0)
        self.sock.close(linger=0)          # everything delivered was acknowledged; the rest is counted
        if self.authenticator:
            self.authenticator.stop()
