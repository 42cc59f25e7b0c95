"""The consuming side of an endpoint (docs/wire.md, "Endpoints"): a DEALER that asks, checks and acknowledges.

:class:`EndpointClient` connects to an endpoint (a bandloom block's, or any
program's that speaks the protocol), with CURVE keys when given: it uses the
key folder's ``client.key_secret`` as its own key pair and ``server.key`` to
know the endpoint. It asks for ``credit`` messages ahead, checks every
message as a link's receiving end does (:mod:`.wire`: limits, whitelists,
:class:`~.wire.Continuity` for gaps by ``first_index``), and acknowledges a
message once the caller has taken it, with one more credit, so that the
endpoint counts as delivered only what was really processed.

After a reconnect the endpoint sends first what the last connection had not
acknowledged; messages that end at or before the rows already taken are
skipped here (``duplicates``), as the protocol says.

A gap (rows skipped before a message) is bounded by the time since the last
message: at most :data:`GAP_SPEED_BOUND` times what the stream's sample rate
fills in that time, and never less than :data:`MIN_GAP_BOUND` rows (a sender
that reads a file runs faster than real time). A larger one is refused as a
forged or corrupt header before it is counted, so an outside sender can
neither inflate the counts nor make a writer fill a disk with zeros.

Used twice: by :class:`EndpointInlet`, the receiving end of a link that comes
from another host (the source's share serves it as an endpoint, see
:mod:`.shares`), and by the ``endpoint-reader`` source block
(:mod:`.endpoint_reader`), which consumes any endpoint in a flow.
"""

from __future__ import annotations

import os
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import zmq
import zmq.auth
from bandloom.blocks.block import Chunk, StreamInfo

from . import wire
from .links import Inlet, LinkError, configure, recv_monitor_event
from .worker_spec import LinkSpec

__all__ = ["GAP_SPEED_BOUND", "MIN_GAP_BOUND", "EndpointClient", "EndpointInlet", "EndpointRefused", "Received", "secure_client"]

GAP_SPEED_BOUND = 1000     # a gap may span at most this many times the rows its silence could hold
MIN_GAP_BOUND = 1 << 24    # ... or this many rows, whichever is more
HANDSHAKE_FAILED = (zmq.EVENT_HANDSHAKE_FAILED_NO_DETAIL | zmq.EVENT_HANDSHAKE_FAILED_PROTOCOL
                    | zmq.EVENT_HANDSHAKE_FAILED_AUTH)


class EndpointRefused(ConnectionError):
    """The endpoint turned this consumer away (another one is attached, or a request was bad)."""


def secure_client(sock: zmq.Socket, keys_dir: str | Path) -> None:
    """Make ``sock`` a CURVE client with a folder made by 'bandloom keys': its own pair from
    ``client.key_secret``, the server's public key from ``server.key``."""
    keys_dir = Path(keys_dir)
    public, secret = zmq.auth.load_certificate(str(keys_dir / "client.key_secret"))
    server_public, _ = zmq.auth.load_certificate(str(keys_dir / "server.key"))
    assert secret is not None
    sock.curve_secretkey = secret
    sock.curve_publickey = public
    sock.curve_serverkey = server_public


@dataclass(frozen=True)
class Received:
    """One message taken: its checked header, its samples (None for end of stream) and the rows missing
    just before it (its gap, counted by the client's continuity)."""

    header: dict
    data: np.ndarray | None
    gap: int

    @property
    def end(self) -> bool:
        return bool(self.header["flags"] & wire.FLAG_END)


class EndpointClient:
    """One consumer of one endpoint (see the module doc). ``expect`` is the stream the caller was set up
    for: a message with another sample type or width is refused with a WireError naming both.
    ``start_index`` is where the caller's stream stands already (a restarted block)."""

    def __init__(self, context: zmq.Context, endpoint: str, *, label: str, keys: str | Path | None = None,
                 credit: int = 8, expect: StreamInfo | None = None, start_index: int = 0) -> None:
        self.endpoint = endpoint
        self.label = label
        self.expect = expect
        self.credit = max(2, credit)          # one message in hand, one more on its way: never a stall
        self.continuity = wire.Continuity(next_index=start_index)
        self.headers = wire.HeaderDecoder()
        self.duplicates = 0
        self.handshake_failures = 0
        self.handshakes = 0
        self.reconnects = 0
        self._pending_ack: int | None = None
        self._owed_credit = 0                  # credit and acknowledgement not yet handed to ZeroMQ (see _request)
        self._owed_ack: int | None = None
        self._last_message = time.monotonic()
        self.sock = context.socket(zmq.DEALER)
        try:
            configure(self.sock, self.credit + 2)
            self.sock.setsockopt(zmq.SNDHWM, 1000)         # requests are tiny; let many wait for the connection
            self.sock.setsockopt(zmq.LINGER, 1000)       # a last ack or bye may still go out
            self.sock.routing_id = os.urandom(16)          # the same consumer after a reconnect, to the endpoint
            if keys:
                secure_client(self.sock, keys)
            self.monitor = self.sock.get_monitor_socket(HANDSHAKE_FAILED | zmq.EVENT_HANDSHAKE_SUCCEEDED)
            self.sock.connect(endpoint)
        except (zmq.ZMQError, OSError, ValueError) as error:
            self.sock.close(linger=0)
            raise LinkError(f"{label}: cannot connect to {endpoint}: {error}") from None
        self._request(credit=self.credit)

    def _request(self, *, credit: int = 0, ack: int | None = None, bye: bool = False) -> None:
        """Ask for ``credit`` more messages and acknowledge up to ``ack``. Credit and acknowledgements add
        up, so what ZeroMQ cannot take now (its queue for a connection that is down is full) is owed and
        goes with the next request: none is ever dropped (a dropped credit would leave both ends waiting
        for each other). ``bye`` is sent at once, with what is owed, or not at all (the consumer is going)."""
        self._owed_credit += credit
        if ack is not None:
            self._owed_ack = ack if self._owed_ack is None else max(self._owed_ack, ack)
        if not (self._owed_credit or self._owed_ack is not None or bye):
            return
        try:
            self.sock.send(wire.encode_request(min(self._owed_credit, wire.MAX_CREDIT), ack=self._owed_ack, bye=bye),
                           zmq.NOBLOCK)
        except zmq.Again:
            return
        self._owed_credit, self._owed_ack = 0, None

    def read_events(self) -> None:
        """Count handshakes that succeeded and failed (a wrong key: see :attr:`keys_refused`). A handshake
        after the first is a reconnect, under the same routing id: what was taken is acknowledged, the old
        connection is let go with ``bye`` (so the endpoint sends again, first, whatever it sent that did not
        arrive), and credit is asked anew."""
        while self.monitor.poll(0):
            event = recv_monitor_event(self.monitor)["event"]
            if event == zmq.EVENT_HANDSHAKE_SUCCEEDED:
                self.handshakes += 1
                if self.handshakes > 1:
                    self.reconnects += 1
                    last = self.continuity.last_seq
                    self._pending_ack = None
                    self._request(ack=last if last >= 0 else None, bye=True)
                    self._request(credit=self.credit)
            elif event & HANDSHAKE_FAILED:
                self.handshake_failures += 1

    @property
    def keys_refused(self) -> bool:
        """The endpoint has refused every handshake so far (at least two): the keys do not match."""
        self.read_events()
        return self.handshake_failures >= 2 and not self.handshakes

    def acknowledge(self) -> None:
        """The message last returned is processed: acknowledge it and ask for one more."""
        if self._pending_ack is not None:
            self._request(credit=1, ack=self._pending_ack)
            self._pending_ack = None

    def receive(self, timeout_ms: int = 0) -> Received | None:
        """The next message, checked, or None when none came within ``timeout_ms`` (a duplicate after a
        reconnect is skipped and counts as none). The message returned before is acknowledged first.
        Raises WireError for a message that breaks the protocol, EndpointRefused when turned away."""
        self.acknowledge()
        self._request()                           # what is owed, if anything
        if timeout_ms and not self.sock.poll(timeout_ms):
            self.read_events()
            return None
        try:
            frames = self.sock.recv_multipart(zmq.NOBLOCK, copy=False)
        except zmq.Again:
            self.read_events()
            return None
        if len(frames) != 2:
            raise wire.WireError(f"message has {len(frames)} frames, not 2 (header, samples)")
        header = self.headers.decode(frames[0].buffer)
        if header["flags"] & wire.FLAG_REFUSED:
            raise EndpointRefused(f"{self.endpoint} refused this consumer: {header.get('reason', 'no reason given')}")
        c = self.continuity
        if header["count"] and header["first_index"] + header["count"] <= c.next_index:
            self.duplicates += 1                 # sent again after a reconnect (or to a restarted block): taken already
            self._request(credit=1, ack=header["seq"])
            return None
        end = bool(header["flags"] & wire.FLAG_END)
        expect = self.expect
        if not end and expect is not None and (header["sample_type"], header["width"]) != (expect.sample_type,
                                                                                            expect.width):
            raise wire.WireError(f"message carries {header['sample_type']} x {header['width']}; "
                                 f"{self.label} expects {expect.sample_type} x {expect.width}")
        data = None if end else wire.decode_payload(header, frames[1].buffer)
        now = time.monotonic()
        if expect is not None and c.last_seq >= 0:
            bound = max(MIN_GAP_BOUND, expect.sample_rate * (now - self._last_message) * GAP_SPEED_BOUND)
            if header["first_index"] - c.next_index > bound:
                raise wire.WireError(f"message {header['seq']} skips {header['first_index'] - c.next_index} rows "
                                     f"{now - self._last_message:.3f} s after the last one; at {expect.sample_rate:g} "
                                     f"samples/s no sender could have skipped that many (a forged or corrupt header)")
        gap = c.take(header)
        self._last_message = now
        if end:
            self._request(ack=header["seq"])     # the endpoint waits for the end to be acknowledged
        else:
            self._pending_ack = header["seq"]
        return Received(header, data, gap)

    def close(self, *, bye: bool = True) -> None:
        """Send what is owed (an end of stream's acknowledgement among it), say goodbye when ``bye`` (what
        was not acknowledged goes to the next consumer), and close, giving that a second to go out."""
        self._request(bye=bye)
        self.sock.disable_monitor()
        self.monitor.close(linger=0)
        self.sock.close(linger=1000)


class EndpointInlet(Inlet):
    """The receiving end of a link from a block on another host: an :class:`EndpointClient` of the
    endpoint that the source's share serves, with the :class:`~.links.Inlet` interface the worker uses."""

    def __init__(self, context: zmq.Context, spec: LinkSpec, port: str) -> None:
        self.spec = spec
        self.id = spec.link
        self.port = port
        self.stream = spec.stream
        self.client = EndpointClient(context, spec.endpoint, label=f"link {spec.label}", keys=spec.keys,
                                     credit=spec.queue, expect=spec.stream, start_index=spec.resume_index or 0)
        self.sock = self.client.sock
        self.continuity = self.client.continuity
        self.messages = 0
        self.block_index = self.continuity.next_index
        self.resumed = spec.resume_index is not None
        self.lost_at_restart = 0
        self.ended = False

    def receive(self) -> Chunk | None:
        """As :meth:`.links.Inlet.receive`; a duplicate after a reconnect gives an empty chunk."""
        got = self.client.receive()
        if got is None:
            if self.client.keys_refused:
                raise LinkError(f"link {self.spec.label}: {self.spec.endpoint} refused this host's keys; every "
                                f"host needs a copy of the same key folder ([flow] keys)")
            return self._empty(self.block_index, 0)
        header = got.header
        for_block = header["first_index"] - self.block_index
        self.block_index = self.continuity.next_index
        if self.resumed:
            self.lost_at_restart = max(0, got.gap - header["dropped"])
            self.resumed = False
        if got.end:
            self.ended = True
            return self._empty(header["first_index"], for_block) if for_block else None
        assert got.data is not None
        self.messages += 1
        return Chunk(got.data, header["first_index"],
                     discontinuity=bool(header["flags"] & wire.FLAG_DISCONTINUITY or for_block), dropped=for_block)

    def processed(self) -> None:
        """Acknowledge the chunk the block has taken, at once: the sending host then counts it delivered."""
        self.client.acknowledge()

    def _empty(self, first_index: int, dropped: int) -> Chunk:
        shape = (0,) if self.stream.width == 1 else (0, self.stream.width)
        return Chunk(np.zeros(shape, self.stream.dtype), first_index, discontinuity=bool(dropped), dropped=dropped)

    def close(self) -> None:
        self.client.close(bye=not self.ended)
