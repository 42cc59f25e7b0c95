"""One link's two ends over a real ipc socket: delivery, gaps, end of stream, drops, and their counters."""

import os
import threading
import time

import numpy as np
import pytest
import zmq
from bandloom.blocks.block import Chunk, StreamInfo
from bandloom.runtime import shared_rings
from bandloom.runtime.flow.model import WhenFull
from bandloom.runtime.links import Inlet, Outlet
from bandloom.runtime.shared_rings import make_ring
from bandloom.runtime.worker_spec import LinkSpec

STREAM = StreamInfo("samples", "cf32", 48000.0, 156e6)


@pytest.fixture
def ends(tmp_path):
    """An (outlet, inlet) pair factory on a private ipc endpoint; everything is closed afterwards."""
    context = zmq.Context()
    made = []

    rings = []

    def make(*, queue=8, when_full=WhenFull.WAIT, columns=None, stream=STREAM, batch_seconds=0.0, ring=0,
             should_abort=lambda: False):
        """``ring``: bytes of a shared-memory ring for the link (made here as the launcher makes it)."""
        endpoint = f"ipc://{tmp_path}/link-{len(made)}"
        link = 7
        if ring:
            link = 3_000_000 + len(made)
            assert make_ring(link, ring) is not None
            rings.append(link)
        receiving = LinkSpec(link=link, label="a.out -> b.in", endpoint=endpoint, stream=stream if columns is None
                             else stream.select(list(columns)), bind=True, queue=queue, shared_bytes=ring)
        sending = LinkSpec(link=link, label="a.out -> b.in", endpoint=endpoint, stream=receiving.stream,
                           columns=columns, queue=queue, when_full=when_full, batch_seconds=batch_seconds,
                           consumer="b", shared_bytes=ring)
        inlet = Inlet(context, receiving, "in")
        outlet = Outlet(context, sending, should_abort)
        made.extend([outlet, inlet])
        return outlet, inlet

    yield make
    for end in made:      # what a test left unread is discarded: a sender's close would wait for it for ever
        if isinstance(end, Outlet):
            end.close(discard=True)
        else:
            end.close()
    context.term()
    for link in rings:
        os.close(shared_rings._INHERITED.pop(link))


def test_samples_arrive_with_their_absolute_index(ends, rng):
    """What is sent is what is received, in order, with first_index kept and the counters agreeing."""
    outlet, inlet = ends()
    data = (rng.standard_normal(3000) + 1j * rng.standard_normal(3000)).astype(np.complex64)
    for start in range(0, 3000, 1000):
        outlet.send(Chunk(data[start:start + 1000], start))
    outlet.end()
    got = [inlet.receive() for _ in range(3)]
    assert [c.first_index for c in got] == [0, 1000, 2000]
    assert np.array_equal(np.concatenate([c.data for c in got]), data)
    assert inlet.receive() is None and inlet.ended
    sent, received = outlet.stats(), inlet.stats()
    assert sent.rows == received.rows == 3000 and sent.messages == received.messages == 3
    assert sent.dropped_rows == sent.missing_rows == received.missing == 0


def test_a_jump_in_index_is_a_counted_flagged_gap(ends):
    """A chunk that starts later than the last one ended is sent flagged, with the missing rows counted."""
    outlet, inlet = ends()
    outlet.send(Chunk(np.ones(100, np.complex64), 0))
    outlet.send(Chunk(np.ones(50, np.complex64), 130))
    first, second = inlet.receive(), inlet.receive()
    assert (first.dropped, first.discontinuity) == (0, False)
    assert (second.first_index, second.dropped, second.discontinuity) == (130, 30, True)
    assert outlet.stats().missing_rows == 30 == inlet.stats().missing and outlet.stats().discontinuities == 1


def test_rows_lost_after_the_last_message_travel_in_the_end_of_stream(ends):
    """end(final_index) counts rows that never came after the last chunk; the inlet returns them as an empty gap."""
    outlet, inlet = ends()
    outlet.send(Chunk(np.ones(100, np.complex64), 0))
    outlet.end(final_index=160)
    inlet.receive()
    tail = inlet.receive()
    assert tail.count == 0 and tail.dropped == 60 and tail.first_index == 160 and inlet.ended
    assert outlet.stats().missing_rows == 60 and outlet.stats().next_index == 160


def test_a_dropping_link_counts_every_row_it_drops(ends):
    """With when_full = drop and nobody reading, messages beyond the queues are dropped whole and counted;
    sent + dropped is everything offered, and the messages that get through carry every gap."""
    n = 1 << 16                          # 512 KiB messages: more than the kernel's socket buffers hold
    outlet, inlet = ends(queue=1, when_full=WhenFull.DROP)
    for k in range(40):
        outlet.send(Chunk(np.ones(n, np.complex64), n * k))
    sent = outlet.stats()
    assert sent.dropped_rows > 0 and sent.rows + sent.dropped_rows == 40 * n
    assert sent.dropped_messages * n == sent.dropped_rows
    delivered = carried = 0
    while inlet.sock.poll(500):
        chunk = inlet.receive()
        delivered += chunk.count
        carried += chunk.dropped
    assert delivered == sent.rows
    outlet.send(Chunk(np.ones(n, np.complex64), 40 * n))     # goes through: the reader has emptied the queue
    last = inlet.receive()
    assert last.first_index == 40 * n and last.discontinuity == (last.dropped > 0)
    # every dropped row reaches the reader as missing, in the header of the next message that got through
    assert carried + last.dropped == outlet.stats().dropped_rows == inlet.stats().missing


def test_columns_are_picked_from_a_channels_stream(ends):
    """A link with columns sends only the selected channels, in the order selected."""
    wide = StreamInfo("channels", "cf32", 1e4, 0.0, channels=(0, 1, 2, 3), channel_frequencies=(0.0, 1.0, 2.0, 3.0))
    outlet, inlet = ends(columns=(3, 1), stream=wide)
    frames = np.arange(20, dtype=np.complex64).reshape(5, 4)
    outlet.send(Chunk(frames, 0))
    assert np.array_equal(inlet.receive().data, frames[:, [3, 1]])


def test_link_ends_close_with_the_block_and_name_themselves(tmp_path):
    """An outlet used as a context manager is closed at the end of the block; its repr names the link."""
    context = zmq.Context()
    spec = LinkSpec(link=3, label="src.samples -> sink.samples", endpoint=f"ipc://{tmp_path}/x", stream=STREAM,
                    bind=True)
    with Inlet(context, spec, "samples") as inlet:
        assert repr(inlet) == f"<Inlet link 3 'src.samples -> sink.samples' at ipc://{tmp_path}/x>"
    assert inlet.sock.closed
    context.term()


def test_a_chunk_larger_than_the_message_cap_is_split_by_rows(ends):
    """A 20 MiB chunk travels as several messages of at most MESSAGE_BYTES each, every row once, in order."""
    from bandloom.runtime.links import MESSAGE_BYTES
    outlet, inlet = ends()
    n = (20 << 20) // 8
    data = np.arange(n, dtype=np.float32).astype(np.complex64)
    outlet.send(Chunk(data, 0))
    outlet.end()
    parts = []
    while (chunk := inlet.receive()) is not None:
        assert chunk.data.nbytes <= MESSAGE_BYTES
        parts.append(chunk)
    assert len(parts) == -(-data.nbytes // MESSAGE_BYTES) and parts[1].first_index == len(parts[0].data)
    assert np.array_equal(np.concatenate([p.data for p in parts]), data)
    assert outlet.stats().rows == inlet.stats().rows == n and inlet.stats().missing == 0


def test_a_long_queue_gets_messages_small_enough_to_bound_its_bytes(ends):
    """queue = 100,000 messages: each message holds at most QUEUE_BYTES / queue of samples, so a full queue
    holds at most QUEUE_BYTES (256 MiB) at each end, not 100,000 x 8 MiB; every row still arrives once."""
    from bandloom.runtime.links import QUEUE_BYTES
    outlet, inlet = ends(queue=100_000)
    data = np.arange(100_000, dtype=np.float32).astype(np.complex64)
    outlet.send(Chunk(data, 0))
    outlet.end()
    parts = []
    while (chunk := inlet.receive()) is not None:
        assert chunk.data.nbytes * 100_000 <= QUEUE_BYTES
        parts.append(chunk.data)
    assert np.array_equal(np.concatenate(parts), data)
    assert len(parts) == -(-data.nbytes // (QUEUE_BYTES // 100_000 // 8 * 8))


def test_the_receiver_counts_rows_a_sender_skipped_without_saying_so(ends):
    """A forged or faulty sender whose header says nothing is missing, while its index jumps: the receiver
    counts the gap from the index itself; an index going backwards is refused, naming the message."""
    from bandloom.runtime import wire
    outlet, inlet = ends()
    fixed = dict(stream="forged", sample_type="cf32", sample_rate=48000.0, centre_frequency=156e6, width=1)
    payload = np.ones(10, np.complex64)
    outlet.sock.send_multipart([wire.encode_header(seq=0, first_index=0, count=10, **fixed), payload])
    outlet.sock.send_multipart([wire.encode_header(seq=1, first_index=25, count=10, **fixed), payload])
    outlet.sock.send_multipart([wire.encode_header(seq=2, first_index=30, count=10, **fixed), payload])
    assert inlet.receive().dropped == 0
    second = inlet.receive()
    assert (second.first_index, second.dropped, second.discontinuity) == (25, 15, True)
    assert inlet.stats().missing == 15
    with pytest.raises(wire.WireError, match="message 2 starts at row 30, before the 35 rows already received"):
        inlet.receive()


def test_small_chunks_wait_to_fill_a_message_of_batch_bytes(ends, rng):
    """With a latency, 1000-row chunks (8 KB) travel in messages of BATCH_BYTES (256 KiB = 32768 rows) and the
    rest at the end of stream; every row once, in order; rows waiting are reported as held, not sent."""
    from bandloom.runtime.links import BATCH_BYTES
    outlet, inlet = ends(batch_seconds=60.0)
    data = (rng.standard_normal(70_000) + 1j * rng.standard_normal(70_000)).astype(np.complex64)
    for start in range(0, 70_000, 1000):
        outlet.send(Chunk(data[start:start + 1000], start))
    rows = BATCH_BYTES // 8
    assert outlet.stats().rows == 2 * rows and outlet.stats().held_rows == 70_000 - 2 * rows
    outlet.end()
    parts = []
    while (chunk := inlet.receive()) is not None:
        parts.append(chunk)
    assert [p.first_index for p in parts] == [0, rows, 2 * rows]
    assert [p.count for p in parts] == [rows, rows, 70_000 - 2 * rows]
    assert np.array_equal(np.concatenate([p.data for p in parts]), data)
    sent = outlet.stats()
    assert sent.rows == inlet.stats().rows == 70_000 and sent.held_rows == 0 and sent.messages == 3


def test_a_gap_ends_the_batch_and_the_next_message_carries_it(ends):
    """A chunk that jumps ahead sends what waits first; the message after the jump is flagged with the gap."""
    outlet, inlet = ends(batch_seconds=60.0)
    outlet.send(Chunk(np.ones(100, np.complex64), 0))
    outlet.send(Chunk(np.ones(100, np.complex64), 100))
    outlet.send(Chunk(np.ones(50, np.complex64), 230))
    outlet.end()
    first, second = inlet.receive(), inlet.receive()
    assert (first.first_index, first.count, first.dropped) == (0, 200, 0)
    assert (second.first_index, second.count, second.dropped, second.discontinuity) == (230, 50, 30, True)
    assert inlet.receive() is None and inlet.stats().missing == 30 == outlet.stats().missing_rows


def test_a_waiting_batch_goes_once_its_latency_has_passed(ends):
    """Rows wait at most the link's latency: after it, flush_if_due (what a worker calls while idle) sends them."""
    outlet, inlet = ends(batch_seconds=0.1)
    outlet.send(Chunk(np.ones(10, np.complex64), 0))
    outlet.flush_if_due()
    assert outlet.holding and not inlet.sock.poll(50)
    time.sleep(0.15)
    outlet.flush_if_due()
    assert not outlet.holding and inlet.receive().count == 10


def test_channels_picked_as_a_run_of_neighbours_are_sent_without_a_copy(ends):
    """All the channels of a stream (a slice of neighbours) go as the block's own array, counted as no copy;
    a gather of scattered channels is counted as copied bytes."""
    wide = StreamInfo("channels", "cf32", 1e4, 0.0, channels=(0, 1, 2, 3), channel_frequencies=(0.0, 1.0, 2.0, 3.0))
    frames = np.arange(40_000, dtype=np.complex64).reshape(10_000, 4)
    outlet, inlet = ends(columns=(0, 1, 2, 3), stream=wide)
    outlet.send(Chunk(frames, 0))
    assert np.array_equal(inlet.receive().data, frames) and outlet.stats().copied_bytes == 0
    outlet, inlet = ends(columns=(3, 0), stream=wide)
    outlet.send(Chunk(frames, 0))
    assert np.array_equal(inlet.receive().data, frames[:, [3, 0]])
    assert outlet.stats().copied_bytes == frames[:, [3, 0]].nbytes


def test_many_single_channel_links_share_one_transposed_copy(ends):
    """Eight links of one channel each take their columns from one transposed copy of the chunk: each gets
    exactly its channel, contiguous, and counts its row of that copy as copied."""
    from bandloom.runtime.links import COLUMN_MAJOR_LINKS, column_major
    width = COLUMN_MAJOR_LINKS
    wide = StreamInfo("channels", "cf32", 1e4, 0.0, channels=tuple(range(width)),
                      channel_frequencies=tuple(float(c) for c in range(width)))
    pairs = [ends(columns=(c,), stream=wide) for c in range(width)]
    frames = (np.arange(5000 * width) * (1 + 1j)).astype(np.complex64).reshape(5000, width)
    chunk = Chunk(frames, 0)
    outlets = [outlet for outlet, _ in pairs]
    picked = column_major(chunk, outlets)
    assert all(p is not None and p.flags["C_CONTIGUOUS"] for p in picked)
    for outlet, one in zip(outlets, picked):
        outlet.send(chunk, picked=one)
    for c, (outlet, inlet) in enumerate(pairs):
        assert np.array_equal(inlet.receive().data, frames[:, c])
        assert outlet.stats().copied_bytes == frames[:, c].nbytes
    assert column_major(chunk, outlets[:width - 1]) == [None] * (width - 1)     # too few to be worth it


@pytest.mark.parametrize("frames, width", [(1, 8), (7, 64), (1000, 64), (4099, 8), (300, 1024), (5, 70000)])
@pytest.mark.parametrize("dtype", [np.complex64, np.float32])
def test_a_tiled_transpose_equals_numpys(frames, width, dtype):
    """links.transposed copies a tile of rows at a time; the result is numpy's own ``data.T``, contiguous,
    for any shape (a last tile cut short, one row, more columns than a tile holds) and for a strided view."""
    from bandloom.runtime.links import transposed
    rng = np.random.default_rng(frames * width)
    data = rng.standard_normal((frames, 2 * width)).astype(np.float32).view(dtype)[:, :width]
    ours = transposed(data)
    assert ours.flags["C_CONTIGUOUS"] and ours.dtype == data.dtype and np.array_equal(ours, data.T)


def test_a_narrow_link_through_shared_memory_fills_its_batch_in_place(ends, rng):
    """Small chunks on a link with a ring and a latency: the batch is filled where it lies in the ring, so
    each row is copied once (into the batch) and sent with no copy more; the consumer gets every row."""
    outlet, inlet = ends(batch_seconds=10.0, ring=1 << 20)
    data = (rng.standard_normal(40_000) + 1j * rng.standard_normal(40_000)).astype(np.complex64)
    for start in range(0, len(data), 1000):
        outlet.send(Chunk(data[start:start + 1000], start))
    outlet.end()
    got = []
    while (chunk := inlet.receive()) is not None:
        got.append(chunk.data.copy())
    stats = outlet.stats()
    assert np.array_equal(np.concatenate(got), data)
    assert stats.shared_messages == stats.messages > 1 and stats.copied_bytes == data.nbytes
    assert inlet.ring is not None and inlet.ring.ring_messages == stats.messages


def test_a_full_socket_holds_the_sender_back_and_loses_nothing(ends):
    """A lossless link whose consumer does not read: once its queue (and the kernel's buffer) is full the
    sender waits, counting the time as blocked, instead of dropping; when the consumer reads, every message
    arrives in order and the sender finishes with nothing dropped."""
    outlet, inlet = ends(queue=1)
    rows, count = (256 << 10) // 8, 64
    sender = threading.Thread(target=lambda: [outlet.send(Chunk(np.full(rows, n, np.complex64), n * rows))
                                              for n in range(count)])
    sender.start()
    deadline = time.monotonic() + 30
    while outlet.blocked_seconds < 0.4 and time.monotonic() < deadline:
        time.sleep(0.05)
    assert sender.is_alive() and outlet.blocked_seconds >= 0.4, "the sender did not wait for the consumer"
    got = [int(inlet.receive().data[0].real) for _ in range(count)]
    sender.join(30)
    assert not sender.is_alive() and got == list(range(count))
    stats = outlet.stats()
    assert stats.messages == count and stats.dropped_rows == stats.dropped_messages == 0


def test_a_dropping_link_drops_what_its_full_ring_cannot_take_and_says_so(ends):
    """Ring of 1 MiB, messages of 256 KiB, nobody reading: four fit, the fifth is dropped and counted, and the
    next message the consumer gets declares the gap."""
    outlet, inlet = ends(when_full=WhenFull.DROP, queue=64, ring=1 << 20)
    rows = (256 << 10) // 8
    for n in range(5):
        outlet.send(Chunk(np.full(rows, n, np.complex64), n * rows))
    assert outlet.stats().dropped_messages == 1 and outlet.stats().dropped_rows == rows
    taken = [inlet.receive() for _ in range(4)]
    assert [int(c.data[0].real) for c in taken] == [0, 1, 2, 3]
    del taken
    outlet.send(Chunk(np.full(rows, 5, np.complex64), 5 * rows))
    after = inlet.receive()
    assert after.discontinuity and after.dropped == rows and int(after.data[0].real) == 5


def test_a_consumer_that_keeps_every_message_gets_the_next_inline_not_a_stall(ends):
    """The consumer has read all four messages the ring holds and keeps them: the sender does not wait for
    room that cannot come; the fifth goes through the socket, and the kept rows are untouched."""
    waited = []
    outlet, inlet = ends(queue=64, ring=1 << 20, should_abort=lambda: waited.append(1) or len(waited) > 2000)
    rows = (256 << 10) // 8
    kept = []
    for n in range(5):
        outlet.send(Chunk(np.full(rows, n, np.complex64), n * rows))
        kept.append(inlet.receive())
    assert outlet.stats().shared_messages == 4 and outlet.stats().messages == 5
    assert [int(c.data[-1].real) for c in kept] == [0, 1, 2, 3, 4]


WIDE16 = StreamInfo("channels", "cf32", 1e4, 0.0, channels=tuple(range(16)), channel_frequencies=tuple(range(16)))


def test_rows_made_in_lent_room_go_from_where_they_lie(ends, rng):
    """A block writes its next chunk in room the link lends it in the ring: the consumer gets it intact, the
    message went through the ring, and no byte was copied; room taken back unused is given again for the
    next chunk, and ordinary sends in between still arrive."""
    outlet, inlet = ends(stream=WIDE16, batch_seconds=10.0, ring=4 << 20)
    rows = outlet.batch_rows                                  # 256 KiB / 128-byte rows
    frames = (rng.standard_normal((3 * rows, 16)) + 1j * rng.standard_normal((3 * rows, 16))).astype(np.complex64)
    room = outlet.lend_room((rows, 16), np.dtype(np.complex64))
    assert room is not None and room.shape == (rows, 16)
    room[...] = frames[:rows]
    outlet.send(Chunk(room, 0))
    unused = outlet.lend_room((rows, 16), np.dtype(np.complex64))
    assert unused is not None
    outlet.take_back_room()                                   # the block made nothing there
    outlet.send(Chunk(frames[rows:2 * rows].copy(), rows))   # an ordinary chunk: copied into the ring
    again = outlet.lend_room((rows, 16), np.dtype(np.complex64))
    assert again is not None
    again[...] = frames[2 * rows:]
    outlet.send(Chunk(again, 2 * rows))
    outlet.end()
    got = []
    while (chunk := inlet.receive()) is not None:
        got.append(chunk.data.copy())
    assert np.array_equal(np.concatenate(got), frames)
    stats = outlet.stats()
    assert stats.shared_messages == stats.messages == 3
    assert stats.copied_bytes == frames[rows:2 * rows].nbytes  # only the ordinary chunk was copied


def test_room_is_lent_only_where_rows_can_go_as_they_are(ends, rng):
    """No room without a ring, for a pick of columns, for another sample type or row shape, for fewer rows
    than a batch or more than a message, or while rows wait in the batch; a chunk sent while room is lent
    that is not in it is refused with the link named (it would have been written over)."""
    plain, _ = ends(stream=WIDE16, batch_seconds=10.0)
    assert plain.lend_room((4096, 16), np.dtype(np.complex64)) is None          # no ring
    picked, _ = ends(stream=WIDE16, columns=(0, 1), batch_seconds=10.0, ring=4 << 20)
    assert picked.lend_room((4096, 2), np.dtype(np.complex64)) is None
    outlet, inlet = ends(stream=WIDE16, batch_seconds=10.0, ring=4 << 20)
    rows = outlet.batch_rows
    for shape, dtype in [((rows, 16), np.complex128), ((rows, 8), np.complex64), ((rows - 1, 16), np.complex64),
                         ((outlet.rows_per_message + 1, 16), np.complex64)]:
        assert outlet.lend_room(shape, np.dtype(dtype)) is None, (shape, dtype)
    outlet.send(Chunk(np.zeros((10, 16), np.complex64), 0))                  # waits in the batch
    assert outlet.holding and outlet.lend_room((rows, 16), np.dtype(np.complex64)) is None
    outlet.flush()
    assert outlet.lend_room((rows, 16), np.dtype(np.complex64)) is not None
    with pytest.raises(RuntimeError, match="a.out -> b.in.*lent room"):
        outlet.send(Chunk(np.zeros((rows, 16), np.complex64), 10))
    assert inlet.receive().count == 10        # the batch sent (read, so that closing the outlet need not wait)
