"""Shared-memory rings: a link's samples passed between two local block processes without the kernel.

Over an ipc socket every sample byte is copied twice by the kernel, and
the two processes spend 0.85-1.2 ns of CPU per byte between them (the
sender's ZeroMQ thread writes it into the socket, the receiver's reads it
out; docs/performance.md).
A link whose two ends are worker processes forked by the same launcher (see
:mod:`.launcher`) can instead pass its samples through a ring of shared memory
that both map: the sender copies a message's rows into the ring once (or the
block makes them there: :meth:`RingWriter.reserve`, lent by
``Outlet.lend_room``) and ZeroMQ carries only the header and a 16-byte
reference; the receiver hands the block a numpy array viewing the ring, with
no copy at all.

The ring is an anonymous memory file (``memfd_create``) that the launcher
makes before it forks either end and that both inherit: it has no name in any
file system, another user cannot open it, and the kernel frees it when the
last process holding it ends, however the run ends. The launcher makes one
when a link's spec asks for it (:attr:`.worker_spec.LinkSpec.shared_bytes`).

Layout: a 4 KiB header page, then ``capacity`` bytes of data. Positions are
byte counts since the ring was made (they only grow); position ``p`` lives at
data offset ``p % capacity``. A message never wraps: one that would is put
at the start of the data instead, and the bytes skipped count as used. The
header holds, each word on its own cache line::

    offset   0  magic     b"bandring"
    offset  64  capacity  bytes of data
    offset 128  written   position after the last message the sender placed (the sender writes it)
    offset 192  received  position after the last message the receiver has taken (the receiver writes it)
    offset 256  released  position before which the receiver holds nothing (the receiver writes it)

Each word has one writer. The sender writes a message's bytes, then
``written``, then sends the header on the socket; the receiver reads the
reference from the socket, checks it against ``written``, then reads the
bytes. A message's bytes are released when the last numpy array viewing them
is freed (a finalizer on the array the receiver made; views of it keep it
alive), so a block may keep rows as long as it likes: the sender never
writes over them. Releases may come out of order; ``released`` advances
over the oldest message still held only. That the receiver's last read of
a message's bytes comes before its store of ``released`` is guaranteed by
x86-64's memory order (stores are not made visible ahead of earlier loads);
weakly ordered processors (ARM) give no such guarantee without a fence that
Python cannot issue, so rings are used on x86-64 only (:data:`SUPPORTED`).

When the ring has no room the sender waits, as it would for a full socket
(:meth:`RingWriter.has_room`, :meth:`RingWriter.should_wait`), except when the receiver has taken every
message in the ring and still holds them (a block that keeps its input): the
message then goes inline, through the socket as on any other link. Every
message on such a link, inline or not, carries the sender's ``written``
position, so a receiver that restarted (and so holds nothing of what its
predecessor took) frees the ring on the first message it reads.
"""

from __future__ import annotations

import math
import mmap
import os
import platform
import struct
import threading
import weakref
from collections import deque
from collections.abc import Mapping

import numpy as np

from .wire import WireError

__all__ = ["HEADER_BYTES", "MAX_RING_BYTES", "MIN_RING_BYTES", "REFERENCE_BYTES", "RingError", "RingReader", "SUPPORTED",
           "RingWriter", "TOTAL_RING_BYTES", "inherited_ring", "make_ring", "ring_bytes"]

HEADER_BYTES = 4096
SUPPORTED = platform.machine().lower() in ("x86_64", "amd64")     # see the module doc: memory order
MIN_RING_BYTES = 1 << 20
MAX_RING_BYTES = 8 << 20
TOTAL_RING_BYTES = 64 << 20             # shared out among one machine's rings (see ring_bytes; pages are used as written)
REFERENCE_BYTES = 16
_MAGIC = int.from_bytes(b"bandring", "little")
_MAGIC_AT, _CAPACITY_AT, _WRITTEN_AT, _RECEIVED_AT, _RELEASED_AT = (8 * n for n in range(5))   # uint64 word indices
_REFERENCE = struct.Struct("<QQ")        # position of the bytes, their length (0: the message is inline)

_INHERITED: dict[int, int] = {}          # link id -> memory file descriptor (made in the launcher, kept across fork)


class RingError(WireError):
    """A reference to ring bytes that the ring cannot hold (a forged or corrupt message), or a ring that is
    not one; the text says what and why."""


def ring_bytes(byte_rates: Mapping[int, float]) -> dict[int, int]:
    """The data capacity of each link's ring, given each link's samples in bytes per second: a share of
    :data:`TOTAL_RING_BYTES` in proportion to its rate, within :data:`MIN_RING_BYTES` ..
    :data:`MAX_RING_BYTES`, in whole pages (so the rings hold at most TOTAL_RING_BYTES plus MIN_RING_BYTES
    a link). A fast link gets the larger ring: its messages are larger and more of them
    are in flight, so the two processes need not run in step; a 64-channel split's narrow links take
    the minimum and its input link the maximum (fan-out flow, docs/performance.md). A rate that is not
    a positive number counts as the mean of the others (equal shares if none is).

    >>> sizes = ring_bytes({1: 8.0, 2: 8.0})
    >>> sizes[1] == sizes[2] == MAX_RING_BYTES
    True
    >>> sizes = ring_bytes({0: 51.2e6} | {k: 0.8e6 for k in range(1, 65)})
    >>> sizes[0] == MAX_RING_BYTES, sizes[1] == MIN_RING_BYTES
    (True, True)
    >>> set(ring_bytes({k: float("nan") for k in range(16)}).values()) == {4 << 20}
    True
    """
    known = [rate for rate in byte_rates.values() if math.isfinite(rate) and rate > 0]
    fill = sum(known) / len(known) if known else 1.0
    rates = {link: rate if math.isfinite(rate) and rate > 0 else fill for link, rate in byte_rates.items()}
    total = sum(rates.values())
    sizes = {}
    for link, rate in rates.items():
        wanted = min(MAX_RING_BYTES, max(MIN_RING_BYTES, int(TOTAL_RING_BYTES * (rate / total))))
        sizes[link] = -(-wanted // mmap.PAGESIZE) * mmap.PAGESIZE
    return sizes


def make_ring(link: int, capacity: int) -> int | None:
    """In the launcher, before it forks either end of ``link``: the link's memory file, made once (its
    pages are allocated as they are first written); every process forked afterwards inherits it. None
    when the system refuses one (no memory, no descriptors left): the link then passes its samples
    through its socket, and so does every later try for it, so its two ends always agree."""
    if link not in _INHERITED:
        fd = -1
        try:
            fd = os.memfd_create(f"bandloom-link-{link}", os.MFD_CLOEXEC)
            os.ftruncate(fd, HEADER_BYTES + capacity)
            with mmap.mmap(fd, HEADER_BYTES) as header:
                for at, value in ((_CAPACITY_AT, capacity), (_MAGIC_AT, _MAGIC)):
                    header[8 * at:8 * at + 8] = value.to_bytes(8, "little")
        except OSError:
            if fd >= 0:
                os.close(fd)
            fd = -1
        _INHERITED[link] = fd
    return inherited_ring(link)


def inherited_ring(link: int) -> int | None:
    """The memory file of ``link`` this process inherited from the launcher, if any."""
    fd = _INHERITED.get(link, -1)
    return fd if fd >= 0 else None


class _Ring:
    """One process's mapping of a ring: the header's words and the data, as numpy arrays."""

    def __init__(self, fd: int, label: str) -> None:
        self.label = label
        size = os.fstat(fd).st_size
        self.map = mmap.mmap(fd, size)
        words = np.frombuffer(self.map, dtype="<u8", count=HEADER_BYTES // 8)
        self.capacity = int(words[_CAPACITY_AT])
        if int(words[_MAGIC_AT]) != _MAGIC or HEADER_BYTES + self.capacity != size:
            raise RingError(f"link {label}: its shared memory is not a ring ({size} bytes)")
        self.words = words
        self.data = np.frombuffer(self.map, dtype=np.uint8, offset=HEADER_BYTES, count=self.capacity)

    def word(self, at: int) -> int:
        return int(self.words[at])

    def set_word(self, at: int, value: int) -> None:
        self.words[at] = value


class RingWriter:
    """The sending end's side of a ring. It takes up where the ring's ``written`` stands, so a restarted
    sender never writes over what its predecessor placed and the receiver may still hold."""

    def __init__(self, fd: int, label: str) -> None:
        self.ring = _Ring(fd, label)
        self.capacity = self.ring.capacity
        self.position = self.ring.word(_WRITTEN_AT)
        self.fresh_consumer = False      # the receiver restarted: what the ring holds may be nobody's
        self.reserved: np.ndarray | None = None     # bytes held for a batch being filled (see reserve)
        self._reserved_start = 0

    def consumer_restarted(self) -> None:
        """The receiving end is a new instance: messages its predecessor was sent may never be read, so a
        full ring is not waited for until the new one has freed it (see the module doc)."""
        self.fresh_consumer = True

    def _start_for(self, nbytes: int) -> int:
        offset = self.position % self.capacity
        return self.position + (self.capacity - offset if offset + nbytes > self.capacity else 0)

    @property
    def unreleased(self) -> int:
        """Bytes of the ring the receiver has not released yet (read, unread, or skipped at a wrap)."""
        return self.position - self.ring.word(_RELEASED_AT)

    def has_room(self, nbytes: int) -> bool:
        """``nbytes`` fit after the last message without touching bytes the receiver holds."""
        if nbytes > self.capacity:
            return False
        released = self.ring.word(_RELEASED_AT)
        if self.fresh_consumer and released >= self.position:
            self.fresh_consumer = False
        return self._start_for(nbytes) + nbytes - released <= self.capacity

    def should_wait(self, nbytes: int) -> bool:
        """No room now, and room will come: the receiver has messages of the ring still to read (and will
        release them when done). False when it holds everything it was sent, when the message can never
        fit, or while a restarted receiver has not yet freed the ring: the message then goes inline."""
        return (nbytes <= self.capacity and not self.fresh_consumer
                and self.ring.word(_RECEIVED_AT) < self.position)

    def reserve(self, nbytes: int) -> np.ndarray | None:
        """``nbytes`` of the ring held for the sender to fill in place (a batch of rows), or None without
        room; nothing else is placed until :meth:`commit` or :meth:`cancel`."""
        if self.reserved is not None or not self.has_room(nbytes):
            return None
        start = self._start_for(nbytes)
        self.reserved = self.ring.data[start % self.capacity:start % self.capacity + nbytes]
        self._reserved_start = start
        return self.reserved

    def commit(self, data: np.ndarray) -> bytes:
        """The reserved bytes are filled: ``data`` is their first part (the rest was not needed); return the
        reference frame of a message carrying it."""
        if self.reserved is None or not np.may_share_memory(data, self.reserved) or data.nbytes > len(self.reserved):
            raise RuntimeError(f"link {self.ring.label}: a message was committed that is not the reserved batch")
        self.reserved = None
        self.position = self._reserved_start + data.nbytes
        self.ring.set_word(_WRITTEN_AT, self.position)
        return _REFERENCE.pack(self._reserved_start, data.nbytes)

    def cancel(self) -> None:
        """Give the reservation up (its rows were dropped): nobody was told of those bytes."""
        self.reserved = None

    def place(self, data: np.ndarray) -> bytes:
        """Copy ``data`` (contiguous) into the ring, which must have room; return its reference frame."""
        if self.reserved is not None:
            raise RuntimeError(f"link {self.ring.label}: rows placed while a batch is reserved")
        raw = data.reshape(-1).view(np.uint8)
        start = self._start_for(len(raw))
        offset = start % self.capacity
        self.ring.data[offset:offset + len(raw)] = raw
        self.position = start + len(raw)
        self.ring.set_word(_WRITTEN_AT, self.position)
        return _REFERENCE.pack(start, len(raw))

    def inline_reference(self) -> bytes:
        """The reference frame of a message that goes through the socket: the sender's position only."""
        return _REFERENCE.pack(self.position, 0)

    def close(self) -> None:
        self.reserved = None
        self.ring.data = self.ring.words = None      # type: ignore[assignment]
        try:
            self.ring.map.close()
        except BufferError:          # arrays handed to ZeroMQ still view it: it goes when they do
            pass


class RingReader:
    """The receiving end's side of a ring: turns references into arrays that view the ring, and releases
    each message's bytes when the last array viewing them is freed (from any thread)."""

    def __init__(self, fd: int, label: str) -> None:
        self.ring = _Ring(fd, label)
        self.capacity = self.ring.capacity
        self._lock = threading.Lock()
        self._held: deque[list[int]] = deque()     # [start, end, released?] of messages in arrival order
        self._known = self.ring.word(_RELEASED_AT)  # messages still to come start here or later
        self.ring_messages = 0

    def take(self, reference: bytes | memoryview, dtype: np.dtype, nbytes_expected: int) -> np.ndarray | None:
        """The samples a reference frame points at, as a 1-D array viewing the ring (None for an inline
        message, whose samples are in its payload). Raises RingError for a reference the ring cannot hold."""
        if len(reference) != REFERENCE_BYTES:
            raise RingError(f"link {self.ring.label}: ring reference is {len(reference)} bytes, not "
                            f"{REFERENCE_BYTES}")
        start, nbytes = _REFERENCE.unpack(reference)
        written = self.ring.word(_WRITTEN_AT)
        if nbytes == 0:
            if start > written:
                raise RingError(f"link {self.ring.label}: message says the ring stands at {start}, past the "
                                f"{written} bytes written")
            self._note(start)
            return None
        offset = start % self.capacity
        if (nbytes != nbytes_expected or start + nbytes > written or start < self._known
                or offset + nbytes > self.capacity):
            raise RingError(f"link {self.ring.label}: ring reference to {nbytes} bytes at position {start} "
                            f"does not fit the ring ({self.capacity} bytes, {written} written; the header "
                            f"says {nbytes_expected} bytes)")
        piece = self.ring.data[offset:offset + nbytes]
        array = np.frombuffer(piece.data, dtype=dtype)    # its own array: views of it keep it alive
        entry = [start, start + nbytes, 0]
        with self._lock:
            self._held.append(entry)
            self._known = max(self._known, start + nbytes)
        self.ring.set_word(_RECEIVED_AT, max(self.ring.word(_RECEIVED_AT), start + nbytes))
        weakref.finalize(array, self._release, entry)
        self.ring_messages += 1
        return array

    def _note(self, position: int) -> None:
        with self._lock:
            self._known = max(self._known, position)
            self._publish()
        self.ring.set_word(_RECEIVED_AT, max(self.ring.word(_RECEIVED_AT), position))

    def _release(self, entry: list[int]) -> None:
        with self._lock:
            entry[2] = 1
            self._publish()

    def _publish(self) -> None:
        """Move ``released`` up to the oldest message still held (or all that is known to be sent)."""
        held = self._held
        while held and held[0][2]:
            held.popleft()
        if self.ring.words is not None:
            self.ring.set_word(_RELEASED_AT, held[0][0] if held else self._known)

    @property
    def holding(self) -> int:
        """Messages whose bytes an array still views."""
        with self._lock:
            return sum(1 for entry in self._held if not entry[2])
