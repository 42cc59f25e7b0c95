"""ZeroMQ links between block processes: one PUSH/PULL pair per link.

* Lossless by default: the sender blocks while the link's queue is full
  (``queue`` messages at each end, set as ZeroMQ high-water marks), so a slow
  consumer slows its producer and memory stays bounded.
* ``when_full = "drop"``: a message that does not fit is dropped whole; its
  rows are counted and the next message that goes through carries the
  discontinuity flag and the number of rows missing before it.
* Messages are sent without copying (``copy=False``): the arrays handed to
  :meth:`Outlet.send` are never modified afterwards.
* A message carries at most :data:`MESSAGE_BYTES` of samples: a larger chunk is
  split across messages by rows, so every socket's ``MAXMSGSIZE`` (the
  same cap, plus the header's limit) is one the link can always honour and
  nothing is ever refused by the transport uncounted. A link with a long
  queue gets smaller messages, so that ``queue`` messages hold at most
  :data:`QUEUE_BYTES` at each end: memory is bounded in bytes whatever
  ``queue`` says.
* Narrow links batch: rows that would make a message smaller than
  :data:`BATCH_BYTES` wait in the outlet (``held_rows``: reported, and counted
  lost if the run is aborted) until the message is that large, its oldest row
  has waited the link's ``batch_seconds`` (its ``latency`` in the flow file),
  the stream jumps (a gap), or the stream ends. With ``batch_seconds`` 0 every
  chunk goes as the block made it. A 64-channel split then sends one message
  where it sent sixteen, which is most of what a message costs its two
  processes.
* A consumer that is down (restarting, or left down by its ``on_failure``):
  the supervisor says ``detach``; until ``attach``, what the outlet would
  send it is dropped and counted (``down_rows``), never waited for, and an
  end of stream is kept for the new instance. After ``attach`` the next
  message declares the gap as usual, and an end of stream already sent is
  sent again (the instance that read it may be the one that died).
* A restarted block's ends start where its predecessor's last report left
  them (``resume_index``); its inlets count what nobody read in between as
  ``lost_at_restart``, while the block itself sees a first chunk whose
  ``dropped`` covers everything before it (it has seen nothing).
* A link between two blocks that the same launcher forked passes its samples
  through a shared-memory ring (:mod:`.shared_rings`) when the launcher made
  one (``LinkSpec.shared_bytes``): its messages carry a third frame, a
  reference into the ring, and an empty payload; a message that does not fit
  in the ring goes inline as on any other link, with the reference frame
  saying so. The sender waits for room in the ring as for room in the
  socket, and a ``drop`` link drops what does not fit. Such links never
  reach outside programs: docs/wire.md is unchanged for them.
* Received messages are decoded with :mod:`.wire` (size limits, whitelists).
* A socket whose bind or connect fails is closed at once and the failure
  names the link (a socket left open would keep its process from exiting).
"""

from __future__ import annotations

import time
from collections.abc import Callable
from pathlib import Path
from types import TracebackType
from typing import Any

import numpy as np
import zmq
import zmq.auth
from bandloom.blocks.block import Chunk

from . import wire
from .control import InletStats, OutletStats
from .flow.model import WhenFull
from .keys import load_server_keys
from .shared_rings import RingReader, RingWriter, inherited_ring
from .worker_spec import LinkSpec

__all__ = ["Aborted", "BATCH_BYTES", "BATCH_POLL_MS", "COLUMN_MAJOR_LINKS", "Inlet", "LinkError", "MESSAGE_BYTES",
           "Outlet", "POLL_MS", "QUEUE_BYTES", "TRANSPOSE_TILE_BYTES", "column_major", "configure", "recv_monitor_event",
           "secure_server", "transposed"]

MESSAGE_BYTES = 8 << 20                       # samples in one message, bytes at most
QUEUE_BYTES = 256 << 20                       # samples a link's queue holds at each end, bytes at most
BATCH_BYTES = 256 << 10                       # smaller messages wait for more rows (for batch_seconds at most)
POLL_MS = 200
COLUMN_MAJOR_LINKS = 8                        # this many single-channel links share one transposed copy
TRANSPOSE_TILE_BYTES = 32 << 10               # rows transposed at a time, in bytes (see transposed)
BATCH_POLL_MS = 20                            # how often a worker looks at waiting batches while idle



def recv_monitor_event(monitor: zmq.Socket) -> Any:
    """The next event of a socket monitor, as pyzmq's ``recv_monitor_message`` gives it. Its module imports
    asyncio (about 35 ms), so it is imported here on first use: a flow with no endpoint never pays it."""
    from zmq.utils.monitor import recv_monitor_message
    return recv_monitor_message(monitor)

class Aborted(Exception):
    """The run is being aborted; the worker stops at once."""


class LinkError(OSError):
    """A link's socket could not be opened; the message names the link, its endpoint and the reason."""


def open_socket(context: zmq.Context, kind: int, spec: LinkSpec, *, bind: bool,
                prepare: Callable[[zmq.Socket], Any] | None = None) -> tuple[zmq.Socket, Any]:
    """A configured socket bound or connected to the link's endpoint; closed again, and a LinkError
    naming the link raised, when that fails. ``prepare`` runs before bind (CURVE keys)."""
    sock = context.socket(kind)
    extra = None
    try:
        configure(sock, spec.queue)
        extra = prepare(sock) if prepare else None
        if bind:
            sock.bind(spec.endpoint)
        else:
            sock.connect(spec.endpoint)
    except (zmq.ZMQError, OSError, ValueError) as error:
        sock.close(linger=0)
        if extra is not None:
            extra.stop()
        reason = zmq.strerror(error.errno or 0) if isinstance(error, zmq.ZMQError) else str(error)
        raise LinkError(f"link {spec.label}: cannot {'bind' if bind else 'connect to'} {spec.endpoint}: "
                        f"{reason}") from None
    return sock, extra


def configure(sock: zmq.Socket, queue: int) -> None:
    """Options every link socket gets, set before bind or connect."""
    # Unlimited linger: messages queued when a sender closes are still
    # delivered (a consumer may still be starting). An aborted run ends
    # stuck senders by killing them.
    sock.setsockopt(zmq.LINGER, -1)
    sock.setsockopt(zmq.IPV6, 1)           # tcp://[::1]:PORT works; IPv4 addresses still do
    sock.setsockopt(zmq.SNDHWM, queue)
    sock.setsockopt(zmq.RCVHWM, queue)
    sock.setsockopt(zmq.MAXMSGSIZE, MESSAGE_BYTES + wire.HEADER_LIMIT)


class _Authenticators:
    """One ZeroMQ authenticator per context (ZeroMQ allows only one), shared by every CURVE server socket of
    the context, each with its key folder as its ZAP domain; stopped when the last socket lets it go."""

    def __init__(self) -> None:
        self.running: dict[int, tuple[Any, set[str]]] = {}
        self.users: dict[int, int] = {}

    def take(self, context: zmq.Context, keys_dir: Path) -> _AuthenticatorUse:
        from zmq.auth.thread import ThreadAuthenticator

        key = id(context)
        if key not in self.running:
            authenticator = ThreadAuthenticator(context)
            authenticator.start()
            self.running[key] = (authenticator, set())
        authenticator, domains = self.running[key]
        if str(keys_dir) not in domains:
            authenticator.configure_curve(domain=str(keys_dir), location=str(keys_dir / "authorized"))
            domains.add(str(keys_dir))
        self.users[key] = self.users.get(key, 0) + 1
        return _AuthenticatorUse(self, key)

    def release(self, key: int) -> None:
        self.users[key] -= 1
        if not self.users[key]:
            authenticator, _ = self.running.pop(key)
            del self.users[key]
            authenticator.stop()


class _AuthenticatorUse:
    """A socket's hold on its context's authenticator; ``stop`` lets it go (once)."""

    def __init__(self, pool: _Authenticators, key: int) -> None:
        self.pool, self.key, self.stopped = pool, key, False

    def stop(self) -> None:
        if not self.stopped:
            self.stopped = True
            self.pool.release(self.key)


_AUTHENTICATORS = _Authenticators()


def secure_server(sock: zmq.Socket, keys_dir: str | Path, context: zmq.Context) -> _AuthenticatorUse:
    """Make ``sock`` a CURVE server with the keys made by 'bandloom keys' (clients must hold a key in its
    ``authorized/``); return its hold on the context's authenticator, to ``stop()`` when it closes."""
    keys_dir = Path(keys_dir)
    public, secret = load_server_keys(keys_dir)
    use = _AUTHENTICATORS.take(context, keys_dir)
    sock.zap_domain = str(keys_dir).encode()
    sock.curve_secretkey = secret
    sock.curve_publickey = public
    sock.curve_server = True
    return use


def column_major(chunk: Chunk, outlets: list[Outlet]) -> list[np.ndarray | None]:
    """For each outlet, its one column of ``chunk`` if it takes one and many others do too, else None.

    Taking one column out of a wide row-major chunk reads every row for a few bytes each; done for each
    of M single-channel links that is M passes over the chunk. Many such links share one transposed copy
    instead (one pass), each then sending its own contiguous row of it.
    """
    singles = [o for o in outlets if isinstance(o.columns, int)]
    if len(singles) < COLUMN_MAJOR_LINKS or chunk.data.ndim != 2 or not len(chunk.data):
        return [None] * len(outlets)
    rows = transposed(chunk.data)
    return [rows[o.columns] if isinstance(o.columns, int) else None for o in outlets]


def transposed(data: np.ndarray) -> np.ndarray:
    """``data.T`` (2-D) as a new C-contiguous array, copied a tile of rows at a time, each tile
    :data:`TRANSPOSE_TILE_BYTES` (it and its transpose stay in the core's first-level cache). Measured
    against numpy's transposing copy of the whole array: 1.6-2.5x as fast with 64 to 1024 columns of cf32,
    the same with 8 or 16.

    >>> data = np.arange(12).reshape(4, 3)
    >>> bool(np.array_equal(transposed(data), data.T)), transposed(data).flags["C_CONTIGUOUS"]
    (True, True)
    """
    frames, width = data.shape
    out = np.empty((width, frames), data.dtype)
    step = max(8, TRANSPOSE_TILE_BYTES // max(1, width * data.itemsize))
    for start in range(0, frames, step):
        out[:, start:start + step] = data[start:start + step].T
    return out


def _column_picker(columns: tuple[int, ...] | None) -> int | slice | list[int] | None:
    """How an outlet picks its columns: one column as an int, a run of neighbours as a slice (a view,
    no copy; all of them stay contiguous), anything else as a list (a gather).

    >>> _column_picker((3,)), _column_picker((0, 1, 2)), _column_picker((5, 1))
    (3, slice(0, 3, None), [5, 1])
    """
    if columns is None:
        return None
    if len(columns) == 1:
        return columns[0]
    if list(columns) == list(range(columns[0], columns[0] + len(columns))):
        return slice(columns[0], columns[0] + len(columns))
    return list(columns)


class _LinkEnd:
    """What both ends share: a socket that closes with the ``with`` block."""

    spec: LinkSpec

    def close(self) -> None:
        raise NotImplementedError

    def __enter__(self) -> _LinkEnd:
        return self

    def __exit__(self, kind: type[BaseException] | None, error: BaseException | None,
                 trace: TracebackType | None) -> None:
        self.close()

    def __repr__(self) -> str:
        return f"<{type(self).__name__} link {self.spec.link} {self.spec.label!r} at {self.spec.endpoint}>"


class Outlet(_LinkEnd):
    """The sending end of one link; ``should_abort`` is asked while the link is full."""

    def __init__(self, context: zmq.Context, spec: LinkSpec, should_abort: Callable[[], bool]) -> None:
        self.spec = spec
        self.id = spec.link
        self.columns = _column_picker(spec.columns)
        self.stream = spec.stream
        self.when_full = spec.when_full
        self.should_abort = should_abort
        fd = inherited_ring(spec.link) if spec.shared_bytes and spec.consumer else None
        self.ring = RingWriter(fd, spec.label) if fd is not None else None     # before the socket: may fail
        self._open(context, spec)
        # a long queue gets smaller messages, so that queue x message stays within QUEUE_BYTES
        message_bytes = min(MESSAGE_BYTES, QUEUE_BYTES // max(1, spec.queue))
        if self.ring is not None:          # messages a quarter of the ring at most: four can be in flight
            message_bytes = min(message_bytes, self.ring.capacity // 4)
        row_bytes = self.stream.row_bytes
        self.rows_per_message = max(1, message_bytes // row_bytes)
        self.batch_seconds = spec.batch_seconds
        self.batch_rows = max(1, min(self.rows_per_message, BATCH_BYTES // row_bytes)) if spec.batch_seconds else 1
        self._batch: np.ndarray | None = None        # rows waiting to fill a message (see the module doc)
        self._held = 0
        self._held_first = self._held_end = 0
        self._held_discontinuity = False
        self._held_since = 0.0
        self.copied_bytes = 0
        self.shared_messages = 0                      # of messages: their rows went through the ring
        self._lent: np.ndarray | None = None         # room of the ring lent to the block (see lend_room)
        self.next_index = spec.resume_index or 0    # index after the last row sent
        self.offered_index = self.next_index        # index after the last row offered, sent or dropped
        self.seq = spec.resume_seq
        self.restarted = spec.resume_index is not None   # its first message starts a new sequence count
        self.rows = 0
        self.messages = 0
        self.dropped_rows = 0
        self.dropped_messages = 0
        self.down_rows = 0           # of dropped_rows: while the consumer was down
        self.attached = spec.attached
        self.ended = False           # end() was called (its end of stream sent, or kept while detached)
        self.final_index: int | None = None
        self.discontinuities = 0
        self.missing_rows = 0
        self.blocked_seconds = 0.0
        s = self.stream
        self._header = wire.HeaderTemplate(                   # the constant part packed once
            stream=spec.label, sample_type=s.sample_type, sample_rate=s.sample_rate,
            centre_frequency=s.centre_frequency, width=s.width, channels=list(s.channels) if s.channels else None,
            channel_frequencies=list(s.channel_frequencies) if s.channels else None)

    def _open(self, context: zmq.Context, spec: LinkSpec) -> None:
        keys = spec.keys if spec.bind else None
        self.sock, self.authenticator = open_socket(
            context, zmq.PUSH, spec, bind=spec.bind,
            prepare=(lambda sock: secure_server(sock, keys, context)) if keys else None)

    def _send(self, frames: list, *, droppable: bool, seq: int, rows: int) -> bool:
        """Hand one message to the transport; False if it was dropped (only when ``droppable``)."""
        try:                         # most messages find room at once: no poll first (it cost 5-10 us a message)
            self.sock.send_multipart(frames, copy=False, flags=zmq.NOBLOCK)
            return True
        except zmq.Again:            # a message goes whole or not at all: nothing of it was queued
            if droppable:
                return False
        while not self.sock.poll(POLL_MS, zmq.POLLOUT):
            self.blocked_seconds += POLL_MS / 1000
            if self.should_abort():
                raise Aborted()
            if not self.attached and rows:
                return False         # the consumer went down while we waited for it
        started = time.monotonic()
        self.sock.send_multipart(frames, copy=False)
        self.blocked_seconds += time.monotonic() - started
        return True

    def lend_room(self, shape: tuple[int, ...], dtype: np.dtype) -> np.ndarray | None:
        """Room in the link's ring for the next chunk, shape ``shape`` (rows first), for the block to write
        its rows where they are sent from, with no copy; None when that cannot be: no ring, a pick of
        columns, another sample type or row shape, rows waiting in the batch, fewer rows than a batch or
        more than a message, no room (waited for as :meth:`send` waits, except on a ``drop`` link), or the
        consumer down. The next :meth:`send` must carry this room's rows (all, or a first part);
        :meth:`take_back_room` gives up room the block did not use."""
        ring, rows = self.ring, shape[0] if shape else 0
        row_shape = (self.stream.width,) if self.stream.kind == "channels" else ()
        if (ring is None or self.columns is not None or self._held or ring.reserved is not None
                or not self.attached or np.dtype(dtype) != self.stream.dtype or tuple(shape[1:]) != row_shape
                or not self.batch_rows <= rows <= self.rows_per_message):
            return None
        nbytes = rows * self.stream.row_bytes
        if not self._wait_for_ring(ring, nbytes, droppable=self.when_full is WhenFull.DROP):   # as send waits
            return None
        room = ring.reserve(nbytes)
        if room is None:
            return None
        self._lent = room.view(self.stream.dtype).reshape(shape)
        return self._lent

    def take_back_room(self) -> None:
        """Give up the room lent to the block if no chunk was sent from it."""
        if self._lent is not None:
            self._lent = None
            if self.ring is not None:
                self.ring.cancel()

    def send(self, chunk: Chunk, *, picked: np.ndarray | None = None) -> None:
        """Send a chunk (the link's columns of it): whole messages of at most ``rows_per_message`` rows go
        now; rows that would make a message smaller than a batch wait (see the module doc). ``picked`` is
        the link's one column already taken out by the caller (see :func:`column_major`). A chunk written
        in the room :meth:`lend_room` gave goes as one message from where it lies."""
        if self._lent is not None:
            lent, self._lent = self._lent, None
            data = chunk.data
            if (picked is not None or not data.flags.c_contiguous or data.dtype != lent.dtype
                    or data.ctypes.data != lent.ctypes.data or data.nbytes > lent.nbytes):
                if self.ring is not None:
                    self.ring.cancel()
                raise RuntimeError(f"link {self.spec.label}: the block lent room in the ring sent another "
                                   f"chunk first")
            if len(data):
                self._send_rows(data, chunk.first_index, chunk.discontinuity)
            elif self.ring is not None:
                self.ring.cancel()
            return
        if picked is not None:
            data = picked
            self.copied_bytes += picked.nbytes           # its share of the caller's one transposing copy
        else:
            data = chunk.data if self.columns is None else chunk.data[:, self.columns]
        if self._held and (chunk.first_index != self._held_end or chunk.discontinuity):
            self.flush()                       # a jump in the stream starts a message of its own
        start = 0
        if self._held:                         # top up the waiting batch first
            start = min(len(data), self.batch_rows - self._held)
            self._hold(data[:start], chunk.first_index, False)
        if len(data) - start < self.batch_rows:
            if start < len(data):
                self._hold(data[start:], chunk.first_index + start, chunk.discontinuity and start == 0)
            return
        rest = data[start:]
        contiguous = np.ascontiguousarray(rest, dtype=self.stream.dtype)
        if picked is None and not np.may_share_memory(contiguous, rest):   # a gather, or another sample type
            self.copied_bytes += contiguous.nbytes
        step = self.rows_per_message
        for offset in range(0, len(contiguous), step):
            first = chunk.first_index + start + offset
            self._send_rows(contiguous[offset:offset + step], first, chunk.discontinuity and start + offset == 0)

    def _hold(self, data: np.ndarray, first_index: int, discontinuity: bool) -> None:
        """Copy rows (no more than the batch has room for) into the batch; send it when it is full."""
        if not self._held:
            self._held_first, self._held_discontinuity = first_index, discontinuity
            self._held_since = time.monotonic()
            self._batch = self._new_batch(data.shape[1:])
        assert self._batch is not None
        self._batch[self._held:self._held + len(data)] = data
        self.copied_bytes += self._batch[:len(data)].nbytes
        self._held += len(data)
        self._held_end = first_index + len(data)
        if self._held == self.batch_rows or time.monotonic() - self._held_since >= self.batch_seconds:
            self.flush()

    def _new_batch(self, row_shape: tuple[int, ...]) -> np.ndarray:
        """Room for a batch of rows: in the link's ring when it has room (the batch is then sent from where
        it was filled, with no copy more), else in this process's memory."""
        shape = (self.batch_rows,) + row_shape
        if self.ring is not None:
            room = self.ring.reserve(self.batch_rows * self.stream.row_bytes)
            if room is not None:
                return room.view(self.stream.dtype).reshape(shape)
        return np.empty(shape, dtype=self.stream.dtype)

    def flush(self) -> None:
        """Send the rows waiting in the batch, if any."""
        if not self._held:
            return
        assert self._batch is not None
        batch, self._batch = self._batch[:self._held], None     # sent without copying: never written again
        self._held = 0
        self._send_rows(batch, self._held_first, self._held_discontinuity)

    @property
    def holding(self) -> bool:
        """Rows wait in the batch."""
        return bool(self._held)

    def flush_if_due(self) -> None:
        """Send the batch if its oldest row has waited ``batch_seconds`` (the worker asks while idle)."""
        if self._held and time.monotonic() - self._held_since >= self.batch_seconds:
            self.flush()

    def _send_rows(self, data: np.ndarray, first_index: int, discontinuity: bool) -> None:
        chunk = Chunk(data, first_index, discontinuity)
        count = len(data)
        if count == 0:
            return
        self.offered_index = chunk.first_index + count
        gap = chunk.first_index - self.next_index
        if gap < 0:
            raise RuntimeError(f"link {self.spec.label}: chunk starts at {chunk.first_index}, before "
                               f"the {self.next_index} rows already sent")
        flags = wire.FLAG_DISCONTINUITY if (gap or chunk.discontinuity or self.restarted) else 0
        header = self._header.encode(seq=self.seq, first_index=chunk.first_index, count=count, flags=flags,
                                    dropped=gap)
        droppable = self.when_full is WhenFull.DROP
        frames, in_ring = self._frames(header, data, droppable=droppable) if self.attached else (None, False)
        if frames is None and self.ring is not None:
            self.ring.cancel()               # a batch filled in the ring, dropped: nobody hears of its bytes
        if frames is None or not self._send(frames, droppable=droppable, seq=self.seq, rows=count):
            self.dropped_rows += count
            self.dropped_messages += 1
            self.down_rows += 0 if self.attached else count
            return
        self.seq += 1
        self.restarted = False
        self.messages += 1
        self.shared_messages += in_ring
        self.rows += count
        self.discontinuities += bool(flags)
        self.missing_rows += gap
        self.next_index = chunk.first_index + count

    def _frames(self, header: bytes, data: np.ndarray, *, droppable: bool) -> tuple[list | None, bool]:
        """The frames of one message, and whether its rows went into the link's ring. On a link with a
        ring, they are copied into it when there is room, waiting for room as for a full socket, else they
        go inline (see :mod:`.shared_rings`). No frames when the message is dropped: the ring is full on a
        ``drop`` link, or the consumer went down while we waited."""
        ring = self.ring
        if ring is None:
            return [header, data], False
        if ring.reserved is not None:        # the batch, filled where it lies in the ring
            return [header, b"", ring.commit(data)], True
        nbytes = data.nbytes
        if not self._wait_for_ring(ring, nbytes, droppable=droppable):
            return None, False
        if ring.has_room(nbytes):
            self.copied_bytes += nbytes
            return [header, b"", ring.place(data)], True
        return [header, data, ring.inline_reference()], False

    def _wait_for_ring(self, ring: RingWriter, nbytes: int, *, droppable: bool) -> bool:
        """Wait until the consumer frees room for ``nbytes`` in the ring (or it need not be waited for);
        False when the message is to be dropped instead: a ``droppable`` one that would have to wait, or
        the consumer went down meanwhile. Checks after 1 ms, then every 5 ms at most (the consumer is
        behind: a millisecond more does not delay it, and each check wakes this process)."""
        if ring.has_room(nbytes) or not ring.should_wait(nbytes):
            return True
        if droppable:
            return False
        started, pause = time.monotonic(), 0.001
        try:
            while not ring.has_room(nbytes) and ring.should_wait(nbytes):
                if self.should_abort():
                    raise Aborted()
                if not self.attached:
                    return False
                time.sleep(pause)
                pause = min(2 * pause, 0.005)
        finally:
            self.blocked_seconds += time.monotonic() - started
        return True

    def detach(self) -> None:
        """The consumer is down: drop and count until :meth:`attach`."""
        self.attached = False

    def attach(self) -> None:
        """The consumer is up again: send to it; an end of stream already due is sent (again)."""
        if self.attached:
            return
        self.attached = True
        if self.ring is not None:
            self.ring.consumer_restarted()
        if self.ended:
            self._send_end()

    def end(self, final_index: int | None = None) -> None:
        """Send end of stream, counting rows lost after the last message: dropped here when the
        link was full, or (``final_index``, from a live source) never delivered to the block. While
        the consumer is down the end is kept, and sent when it is attached again."""
        self.flush()
        self.ended = True
        self.final_index = final_index
        if self.attached:
            self._send_end()

    def _send_end(self) -> None:
        gap = max(0, max(self.final_index or 0, self.offered_index) - self.next_index)
        flags = wire.FLAG_END | (wire.FLAG_DISCONTINUITY if gap or self.restarted else 0)
        header = self._header.encode(seq=self.seq, first_index=self.next_index + gap, count=0, flags=flags,
                                    dropped=gap)
        frames = [header, b""] if self.ring is None else [header, b"", self.ring.inline_reference()]
        self._send(frames, droppable=False, seq=self.seq, rows=0)
        self.missing_rows += gap
        self.discontinuities += bool(gap)
        self.next_index += gap

    def stats(self) -> OutletStats:
        return OutletStats(rows=self.rows, messages=self.messages, seq=self.seq, dropped_rows=self.dropped_rows,
                           dropped_messages=self.dropped_messages, discontinuities=self.discontinuities,
                           missing_rows=self.missing_rows, down_rows=self.down_rows, next_index=self.next_index,
                           blocked_seconds=round(self.blocked_seconds, 3), held_rows=self._held,
                           copied_bytes=self.copied_bytes, shared_messages=self.shared_messages)

    def close(self, *, discard: bool = False) -> None:
        """Close; queued messages are still delivered unless ``discard`` (abort, error) or the consumer
        is down (they are counted in flight: sent, read by nobody)."""
        self.sock.close(linger=0 if discard or not self.attached else None)
        if self.authenticator:
            self.authenticator.stop()
        if self.ring is not None:
            self.ring.close()


class Inlet(_LinkEnd):
    """The receiving end of one link, feeding input ``port``; binds its private endpoint. Each message is
    checked by a :class:`~.wire.Continuity` (it continues the stream, or it is refused)."""

    def __init__(self, context: zmq.Context, spec: LinkSpec, port: str) -> None:
        self.spec = spec
        self.id = spec.link
        self.port = port
        self.stream = spec.stream
        self.sock, _ = open_socket(context, zmq.PULL, spec, bind=True)
        self.messages = 0
        # absolute index after the last row received or missed: a restarted instance resumes there
        self.continuity = wire.Continuity(next_index=spec.resume_index or 0)
        self.block_index = 0                         # the same, as the block has seen it
        self.resumed = spec.resume_index is not None
        self.lost_at_restart = 0
        self.ended = False
        self.ring: RingReader | None = None      # mapped at the first message that refers to it
        self.headers = wire.HeaderDecoder()

    @property
    def rows(self) -> int:
        return self.continuity.rows

    @property
    def next_index(self) -> int:
        return self.continuity.next_index

    def take_over(self, kept: int | None) -> None:
        """A restarted block says its failed predecessor's work is kept up to index ``kept`` (a file it
        continues): rows up to there that the predecessor read after its last report count as received."""
        if kept is not None and self.resumed and kept > self.next_index:
            self.continuity.rows += kept - self.next_index
            self.continuity.next_index = kept

    def receive(self) -> Chunk | None:
        """Take one message; return a Chunk, or None at the end of the stream (then ``ended`` is set;
        an end of stream that counts lost rows first returns them as an empty chunk). Raises
        wire.WireError."""
        frames = self.sock.recv_multipart(copy=False)
        if len(frames) != 2 and not (len(frames) == 3 and self.spec.shared_bytes):
            raise wire.WireError(f"message has {len(frames)} frames, not 2 (header, samples)"
                                 + (" or 3 (header, nothing, ring reference)" if self.spec.shared_bytes else ""))
        header = self.headers.decode(frames[0].buffer)
        end = bool(header["flags"] & wire.FLAG_END)
        if not end and (header["sample_type"] != self.stream.sample_type or header["width"] != self.stream.width):
            raise wire.WireError(f"message carries {header['sample_type']} x {header['width']}, the link "
                                 f"was set up for {self.stream.sample_type} x {self.stream.width}")
        in_ring = None
        if len(frames) == 3:
            expected = 0 if end else header["count"] * header["width"] * self.stream.dtype.itemsize
            in_ring = self._ring().take(frames[2].buffer, self.stream.dtype, expected)
            if in_ring is not None and len(frames[1]):
                raise wire.WireError(f"message carries {len(frames[1])} bytes of samples and a ring reference")
        if end:
            data = None
        elif in_ring is not None:
            data = in_ring if header["width"] == 1 else in_ring.reshape(header["count"], header["width"])
        else:
            data = wire.decode_payload(header, frames[1].buffer)
        declared = header["dropped"]
        gap = self.continuity.take(header)          # rows skipped without a word are counted too
        for_block = header["first_index"] - self.block_index      # the gap as the block sees it
        self.block_index = self.continuity.next_index
        if self.resumed:
            # the first message after a restart: what was sent but never declared missing went to
            # the instance that died, or was lost with its connection
            self.lost_at_restart = max(0, gap - declared)
            self.resumed = False
        if end:
            self.ended = True
            if not for_block:
                return None
            # rows lost after the last message: an empty chunk tells the block how many
            return Chunk(np.zeros((0,) if self.stream.width == 1 else (0, self.stream.width), self.stream.dtype),
                         header["first_index"], discontinuity=True, dropped=for_block)
        assert data is not None
        self.messages += 1
        return Chunk(data, header["first_index"],
                     discontinuity=bool(header["flags"] & wire.FLAG_DISCONTINUITY or for_block),
                     dropped=for_block)

    def _ring(self) -> RingReader:
        if self.ring is None:
            fd = inherited_ring(self.id)
            if fd is None:
                raise wire.WireError("message refers to a shared-memory ring, and this link has none")
            self.ring = RingReader(fd, self.spec.label)
        return self.ring

    def processed(self) -> None:
        """The block has taken the chunk last received (and what it made of it is sent on). Nothing to do
        here: ZeroMQ took the message off the link when it was read."""

    def stats(self) -> InletStats:
        c = self.continuity
        return InletStats(rows=c.rows, messages=self.messages, seq=c.last_seq, gaps=c.gaps, missing=c.missing,
                          next_index=c.next_index, lost_at_restart=self.lost_at_restart)

    def close(self) -> None:
        self.sock.close(linger=0)
