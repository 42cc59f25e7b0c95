"""Shared-memory rings between local block processes (runtime/shared_rings.py): bytes come out as they went
in, a message's bytes are never written over while any array views them, forged references are refused with
a reason, a restarted consumer frees the ring, and a whole flow writes byte for byte what the same flow writes
through its sockets (``[flow] shared_memory = false``), which the other flow tests hold to the in-process
bank and that to scipy (tests/test_banks.py).

Every ring here is a real memory file mapped twice, as the two processes of a link map it."""

import mmap
import os
import subprocess
import sys

import numpy as np
import pytest
from bandloom.runtime import shared_rings
from bandloom.runtime.shared_rings import RingError, RingReader, RingWriter, make_ring
from runner import bandloom, run_flow

CAPACITY = 1 << 20
ROW = np.dtype(np.complex64)


@pytest.fixture
def ring():
    """A fresh ring's memory file (as the launcher makes it), forgotten and closed afterwards."""
    link = 1_000_000 + len(shared_rings._INHERITED)
    fd = make_ring(link, CAPACITY)
    assert fd is not None and shared_rings.inherited_ring(link) == fd
    yield fd
    del shared_rings._INHERITED[link]
    os.close(fd)


def message(rows, seed):
    return (np.random.default_rng(seed).standard_normal(2 * rows).astype(np.float32).view(ROW))


def send(writer, data):
    assert writer.has_room(data.nbytes)
    return writer.place(data)


def test_bytes_arrive_as_sent_and_are_released_when_the_last_view_goes(ring):
    writer, reader = RingWriter(ring, "t"), RingReader(ring, "t")
    sent = [message(10_000, seed) for seed in range(3)]
    got = [reader.take(send(writer, data), ROW, data.nbytes) for data in sent]
    assert all(ours.dtype == ROW and np.array_equal(ours, theirs) for ours, theirs in zip(got, sent))
    view = got[0].reshape(100, 100)[::2, 3]          # a view of a view keeps the first message held
    del got[0]
    assert reader.holding == 3
    del view
    assert reader.holding == 2
    got.clear()
    assert reader.holding == 0 and writer.unreleased == 0      # every byte is free again


def test_a_held_message_is_never_written_over_and_a_full_ring_says_whether_to_wait(ring):
    """Messages released out of order: the oldest still held bounds the writer. While the consumer has
    unread messages in the ring, a full ring is waited for; once it holds everything it was sent, the
    writer goes inline instead of waiting for ever."""
    writer, reader = RingWriter(ring, "t"), RingReader(ring, "t")
    piece = message(CAPACITY // 8 // 4, 7)                      # a quarter of the ring
    first = reader.take(send(writer, piece), ROW, piece.nbytes)
    refs = [send(writer, piece) for _ in range(3)]               # the ring is full now
    assert not writer.has_room(piece.nbytes) and writer.should_wait(piece.nbytes)     # three unread
    later = [reader.take(ref, ROW, piece.nbytes) for ref in refs]
    assert not writer.should_wait(piece.nbytes)                  # read, all of them: they are held
    later.clear()                                                 # released, but the first still holds
    assert not writer.has_room(piece.nbytes)
    assert np.array_equal(first, piece)                           # and its bytes are untouched
    del first
    assert writer.has_room(piece.nbytes)


def test_a_message_that_would_wrap_starts_again_at_the_front(ring):
    writer, reader = RingWriter(ring, "t"), RingReader(ring, "t")
    for seed in range(12):                                        # 12 x 0.3 of the ring: wraps three times
        data = message(int(0.3 * CAPACITY) // 8, seed)
        got = reader.take(send(writer, data), ROW, data.nbytes)
        assert np.array_equal(got, data)
        del got
    assert writer.position > 3 * CAPACITY


@pytest.mark.parametrize("forged, says", [
    (b"\0" * 8, "reference is 8 bytes"),
    ((1 << 40).to_bytes(8, "little") + (8).to_bytes(8, "little"), "does not fit"),     # past what is written
    ((0).to_bytes(8, "little") + (16).to_bytes(8, "little"), "does not fit"),          # the header says 8
    ((1 << 40).to_bytes(8, "little") + (0).to_bytes(8, "little"), "past the"),          # position from the future
])
def test_a_forged_reference_is_refused_with_a_reason(ring, forged, says):
    writer, reader = RingWriter(ring, "link a -> b"), RingReader(ring, "link a -> b")
    send(writer, message(1, 0))
    with pytest.raises(RingError, match=says) as refused:
        reader.take(forged, ROW, 8)
    assert "link a -> b" in str(refused.value)


def test_a_reference_to_bytes_already_released_is_refused(ring):
    writer, reader = RingWriter(ring, "t"), RingReader(ring, "t")
    data = message(1000, 1)
    ref = send(writer, data)
    reader.take(ref, ROW, data.nbytes)        # taken and dropped at once: released
    send(writer, data)
    with pytest.raises(RingError, match="does not fit"):
        reader.take(ref, ROW, data.nbytes)    # the same reference again (a replay)


def test_a_restarted_consumer_frees_what_its_predecessor_held(ring):
    """The consumer died holding two messages and a third was lost with it. The writer does not wait for
    that room: it goes inline, and the new consumer's first message (inline, carrying the writer's
    position) frees the whole ring, after which messages go through it again."""
    writer, dead = RingWriter(ring, "t"), RingReader(ring, "t")
    piece = message(CAPACITY // 8 // 4, 3)
    held = [dead.take(send(writer, piece), ROW, piece.nbytes) for _ in range(2)]
    send(writer, piece)                         # sent, never read by anybody
    send(writer, piece)
    assert not writer.has_room(piece.nbytes) and writer.should_wait(piece.nbytes)
    writer.consumer_restarted()
    assert not writer.should_wait(piece.nbytes)                  # inline, not waiting for ever
    fresh = RingReader(ring, "t")
    assert fresh.take(writer.inline_reference(), ROW, piece.nbytes) is None
    assert writer.has_room(piece.nbytes) and not writer.fresh_consumer
    assert np.array_equal(fresh.take(send(writer, piece), ROW, piece.nbytes), piece)
    assert len(held) == 2                       # (the dead one's arrays: a real one's went with its process)


def test_a_restarted_writer_continues_where_its_predecessor_stopped(ring):
    first, reader = RingWriter(ring, "t"), RingReader(ring, "t")
    data = message(5000, 4)
    kept = reader.take(send(first, data), ROW, data.nbytes)
    second = RingWriter(ring, "t")
    assert second.position == first.position
    for seed in range(20):
        other = message(5000, 10 + seed)
        assert np.array_equal(reader.take(send(second, other), ROW, other.nbytes), other)
    assert np.array_equal(kept, data)


def test_a_ring_the_system_refuses_leaves_the_link_on_its_socket():
    """No descriptor left for a memory file (a real limit, in a process of its own): no ring, now or on a
    later try for the same link, so both ends agree that the link goes through its socket."""
    script = """
import resource
from bandloom.runtime.shared_rings import inherited_ring, make_ring
hard = resource.getrlimit(resource.RLIMIT_NOFILE)[1]
resource.setrlimit(resource.RLIMIT_NOFILE, (3, hard))
first = make_ring(7, 1 << 20)
resource.setrlimit(resource.RLIMIT_NOFILE, (64, hard))
print(first, make_ring(7, 1 << 20), inherited_ring(7))
"""
    done = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, timeout=60)
    assert done.returncode == 0 and done.stdout.split() == ["None"] * 3, done.stderr


def test_a_batch_is_filled_where_it_lies_and_only_its_filled_part_is_sent(ring):
    """reserve / commit: the writer fills rows in place; nothing else may be placed meanwhile, and only the
    reserved bytes may be committed; a cancelled reservation leaves the ring as it was."""
    writer, reader = RingWriter(ring, "t"), RingReader(ring, "t")
    room = writer.reserve(4096)
    batch = room.view(ROW)
    batch[:100] = message(100, 5)
    with pytest.raises(RuntimeError, match="reserved"):
        writer.place(message(1, 0))
    with pytest.raises(RuntimeError, match="not the reserved batch"):
        writer.commit(message(100, 5))
    got = reader.take(writer.commit(batch[:100]), ROW, 800)
    assert np.array_equal(got, message(100, 5)) and writer.position == 800
    before = writer.position
    assert writer.reserve(4096) is not None
    writer.cancel()
    assert writer.position == before and writer.reserved is None
    assert writer.reserve(2 * CAPACITY) is None




FLOW = """
[flow]
shared_memory = {shared}

[blocks.band]
type = "scenario"
sample_rate = 800000
duration = 2
chunk_size = {chunk}
transmitters = [{{ kind = "cw", frequency = 1000.0, level = -10.0 }}, {{ kind = "cw", frequency = -210000.0, level = -30.0 }}]

[blocks.split]
type = "channelizer"
channels = 8
{writers}
[blocks.merge]
type = "synthesis"

[blocks.wide]
type = "iq-writer"
path = "all.cf32"

[[links]]
from = "band.samples"
to = "split.samples"

[[links]]
from = "split.channels"
to = "merge.channels"

[[links]]
from = "merge.samples"
to = "wide.samples"
"""

WRITERS = """
[blocks.rec]
type = "iq-writer"
path = "ch{channel}.cf32"
per_channel = { from = "split.channels", select = "all" }
"""


def run_both_ways(tmp_path, names, **fill):
    """FLOW with and without shared memory: each run ends with nothing lost, every file in ``names`` is byte
    for byte the same both ways; returns the two reports by "true" / "false"."""
    reports = {}
    for shared in ("true", "false"):
        folder = tmp_path / shared
        folder.mkdir()
        (folder / "flow.toml").write_text(FLOW.format(shared=shared, **fill))
        done, reports[shared] = run_flow(folder / "flow.toml", folder)
        assert done.returncode == 0 and "verdict: no sample lost" in done.stderr, done.stderr
    for name in names:
        ours = (tmp_path / "true" / name).read_bytes()
        assert len(ours) > 0 and ours == (tmp_path / "false" / name).read_bytes(), name
    return reports


@pytest.mark.skipif(not shared_rings.SUPPORTED, reason="rings are used on x86-64 only (memory order)")
def test_a_flow_through_shared_memory_writes_what_it_writes_through_sockets(tmp_path):
    """Eight per-channel writers, and the band put back together from all eight channels (a wide link):
    every file is byte for byte the same with shared memory and without, nothing is lost, and the report
    says which messages went through it."""
    reports = run_both_ways(tmp_path, [f"ch{c}.cf32" for c in range(8)] + ["all.cf32"], chunk=10000, writers=WRITERS)
    for link in reports["true"]["links"]:
        assert link["shared_memory_messages"] == link["sent_messages"] > 0, link
        assert link["sent_samples"] == link["received_samples"]
    assert all(link["shared_memory_messages"] == 0 for link in reports["false"]["links"])


@pytest.mark.skipif(not shared_rings.SUPPORTED, reason="rings are used on x86-64 only (memory order)")
def test_a_channelizer_makes_its_frames_in_the_ring_and_they_arrive_as_through_sockets(tmp_path):
    """A channelizer whose one link has a ring makes each chunk's frames in room the link lends it there:
    the merged band is byte for byte what the same flow writes through sockets, nothing is lost, and the
    channelizer's link copied no byte (every chunk, the last one's 27,136 samples too, makes at least a
    256 KiB batch of frames, so each goes as it was made)."""
    reports = run_both_ways(tmp_path, ["all.cf32"], chunk=65536, writers="")
    assert (tmp_path / "true" / "all.cf32").stat().st_size == 1_600_000 * 8
    channels = next(link for link in reports["true"]["links"] if link["link"].startswith("split.channels"))
    assert channels["shared_memory_messages"] == channels["sent_messages"] > 0
    assert channels["sent_samples"] == channels["received_samples"]
    assert channels["copied_bytes"] == 0


def test_the_flow_option_is_checked_like_any_other(tmp_path):
    path = tmp_path / "flow.toml"
    path.write_text(FLOW.format(shared='"yes"', chunk=10000, writers=""))
    checked = bandloom("check", path)
    assert checked.returncode != 0
    assert f"{path}:3" in checked.stderr and "shared_memory" in checked.stderr, checked.stderr


@pytest.mark.skipif(not shared_rings.SUPPORTED, reason="rings are used on x86-64 only (memory order)")
def test_a_reader_reads_its_file_straight_into_the_ring(tmp_path):
    """A cf32 file (300,000 random samples) read into room its link lends it in shared memory and written
    out again: the copy is byte for byte the file, and the reader's link copied no byte (each chunk, the
    last one's 37,856 samples too, fills at least a 256 KiB batch)."""
    data = np.random.default_rng(5).standard_normal(600_000).astype(np.float32)
    data.tofile(tmp_path / "in.cf32")
    (tmp_path / "flow.toml").write_text(
        '[blocks.read]\ntype = "iq-reader"\npath = "in.cf32"\nmetadata = "none"\nsample_rate = 1e6\n\n'
        '[blocks.write]\ntype = "iq-writer"\npath = "out.cf32"\n\n'
        '[[links]]\nfrom = "read.samples"\nto = "write.samples"\n')
    done, report = run_flow(tmp_path / "flow.toml", tmp_path / "out")
    assert done.returncode == 0 and "verdict: no sample lost" in done.stderr, done.stderr
    assert (tmp_path / "out" / "out.cf32").read_bytes() == (tmp_path / "in.cf32").read_bytes()
    (link,) = report["links"]
    assert link["shared_memory_messages"] == link["sent_messages"] == 5 and link["copied_bytes"] == 0


def test_rings_are_shared_out_in_proportion_to_each_links_bytes_per_second(tmp_path):
    """The flow above with eight per-channel writers: eleven links, their rates in bytes per second from
    the flow's streams. The input, the split's link to the synthesis and the band put back together take
    the largest ring (their shares are above it); each per-channel writer's link (1.6 MB/s, 1/24 of the
    38.4 MB/s in all) its share of the 64 MiB, about 2.7 MiB, in whole pages."""
    from bandloom.runtime.flow import load_flow
    from bandloom.runtime.plugins import load_registry
    from bandloom.runtime.supervisor import shared_ring_sizes
    (tmp_path / "flow.toml").write_text(FLOW.format(shared="true", chunk=10000, writers=WRITERS))
    flow = load_flow(tmp_path / "flow.toml", load_registry(), output_dir=tmp_path)
    sizes = shared_ring_sizes(flow, flow.instances)
    by_label = {link.label: sizes[link.id] for link in flow.links}
    assert len(by_label) == 11
    wide = [size for label, size in by_label.items() if not label.startswith("split.channels[")]
    narrow = [size for label, size in by_label.items() if label.startswith("split.channels[")]
    assert len(narrow) == 8 and len(set(narrow)) == 1, by_label
    assert wide == [shared_rings.MAX_RING_BYTES] * 3, by_label
    rates = {link.label: link.stream.sample_rate * link.stream.width * 8 for link in flow.links}
    share = shared_rings.TOTAL_RING_BYTES * rates[next(iter(k for k in rates if k.startswith("split.channels[")))] \
        / sum(rates.values())
    assert shared_rings.MIN_RING_BYTES <= narrow[0] < shared_rings.MAX_RING_BYTES
    assert narrow[0] == -(-int(share) // mmap.PAGESIZE) * mmap.PAGESIZE, (narrow[0], share)
    assert all(size % mmap.PAGESIZE == 0 for size in sizes.values())
