"""The wire format: round trip of a message, and every kind of malformed message refused with a clear reason."""

import msgpack
import numpy as np
import pytest
import zmq
from bandloom.blocks.block import StreamInfo
from bandloom.runtime import wire
from bandloom.runtime.links import Inlet
from bandloom.runtime.worker_spec import LinkSpec


def header(**changes):
    fields = dict(version=1, stream="a.b -> c.d", seq=0, first_index=0, count=4, width=1, sample_type="cf32",
                  sample_rate=48000.0, centre_frequency=0.0, flags=0, dropped=0)
    fields.update(changes)
    return msgpack.packb({k: v for k, v in fields.items() if v is not ...}, use_bin_type=True)


def test_encode_decode_round_trip():
    """encode_header's output decodes to the same fields, and the payload views the samples."""
    raw = wire.encode_header(stream="s", seq=3, first_index=100, count=2, width=3, sample_type="cf32",
                             sample_rate=1e5, centre_frequency=1e8, channels=[0, 1, 5],
                             channel_frequencies=[1e8, 1.1e8, 0.9e8])
    h = wire.decode_header(raw)
    assert (h["seq"], h["first_index"], h["count"], h["width"], h["channels"]) == (3, 100, 2, 3, [0, 1, 5])
    data = np.arange(6, dtype=np.complex64)
    assert np.array_equal(wire.decode_payload(h, data.tobytes()), data.reshape(2, 3))


@pytest.mark.parametrize("raw,message", [
    (b"\x00" * (65 * 1024), "more than the 65536-byte limit"),
    (b"\xc1", "not valid msgpack"),
    (msgpack.packb([1, 2]), "msgpack list, not a map"),
    (header(seq=...), "lacks the field 'seq'"),
    (header(count="4"), "field 'count' is '4', not a int"),
    (header(count=True), "field 'count' is True"),
    (header(version=2), "version 2 is not the supported version 1"),
    (header(sample_type="pickle"), "sample_type 'pickle' is not one of"),
    (header(first_index=-1), "must not be negative"),
    (header(sample_rate=0.0), "sample_rate 0.0 is not a positive number"),
    (header(width=0), "width 0 is outside"),
    (msgpack.packb({"version": msgpack.ExtType(1, b"x")}), "extension type 1"),
])
def test_bad_headers_are_refused(raw, message):
    """Each malformed header raises WireError naming the field and the rule."""
    with pytest.raises(wire.WireError, match=message.replace("(", r"\(")):
        wire.decode_header(raw)


def test_payload_length_must_match_count_and_width():
    """count x width x item size must equal the payload's length."""
    h = wire.decode_header(header(count=4))
    with pytest.raises(wire.WireError, match="payload is 24 bytes; count 4 x width 1 x 8 bytes says 32"):
        wire.decode_payload(h, b"\x00" * 24)


def test_inlet_names_the_link_and_refuses_wrong_shape(tmp_path):
    """An inlet refuses a well-formed message whose type does not match its link, and a 3-frame message."""
    ctx = zmq.Context()
    stream = StreamInfo("samples", "cf32", 48000.0)
    endpoint = f"ipc://{tmp_path}/x"
    inlet = Inlet(ctx, LinkSpec(link=0, endpoint=endpoint, stream=stream, label="a.b -> c.d", bind=True), "samples")
    push = ctx.socket(zmq.PUSH)
    push.connect(endpoint)
    try:
        push.send_multipart([header(sample_type="f32", count=1), b"\x00" * 4])
        with pytest.raises(wire.WireError, match="carries f32 x 1, the link was set up for cf32 x 1"):
            inlet.receive()
        push.send_multipart([header(), b"", b""])
        with pytest.raises(wire.WireError, match="3 frames, not 2"):
            inlet.receive()
        push.send_multipart([header(count=1, dropped=5, first_index=5, flags=2), b"\x00" * 8])
        chunk = inlet.receive()
        assert (chunk.first_index, chunk.dropped, chunk.discontinuity) == (5, 5, True)
    finally:
        push.close(linger=0)
        inlet.close()
        ctx.term()


from hypothesis import given, settings
from hypothesis import strategies as st

FIELDS = ["version", "stream", "seq", "first_index", "count", "width", "sample_type", "sample_rate",
          "centre_frequency", "flags", "dropped", "channels", "channel_frequencies"]
VALUES = st.one_of(st.integers(-2**63, 2**64 - 1), st.floats(), st.text(max_size=8), st.booleans(), st.none(),
                   st.binary(max_size=8), st.lists(st.integers(-5, 5), max_size=4), st.sampled_from(["cf32", "f32"]))


@settings(max_examples=400, deadline=None)
@given(raw=st.one_of(
    st.binary(max_size=400),
    st.dictionaries(st.one_of(st.sampled_from(FIELDS), st.text(max_size=12)), VALUES, max_size=16)
    .map(lambda d: msgpack.packb(d, use_bin_type=True))),
    payload=st.binary(max_size=64))
def test_untrusted_bytes_raise_only_wire_errors(raw, payload):
    """Arbitrary bytes and arbitrary msgpack maps are refused with WireError, never another exception."""
    try:
        h = wire.decode_header(raw)
        wire.decode_payload(h, payload)
    except wire.WireError:
        pass


# -- continuity: a stream of headers, some of them forged -----------------------------------------------------

@st.composite
def streams(draw):
    """A sender's headers (seq, first_index, count, dropped as docs/wire.md says), the rows it skipped, and
    maybe one forgery at position ``at``."""
    rng = np.random.default_rng(draw(st.integers(0, 2**32 - 1)))     # a long stream from a drawn seed
    headers, index, seq, skipped = [], 0, 0, 0
    for _ in range(1000):
        skip = int(rng.choice([0, 0, 0, 0, 3, 1000]))
        declared = skip if rng.random() < 0.5 else 0          # a skip the sender did not declare is still counted
        count = int(rng.integers(0, 5001))
        headers.append(dict(seq=seq, first_index=index + skip, count=count, dropped=declared,
                            flags=wire.FLAG_DISCONTINUITY if skip else 0))
        index, seq, skipped = index + skip + count, seq + 1, skipped + skip
    forgery = draw(st.sampled_from([None, "repeat", "backwards", "over-declared", "seq-skip"]))
    at = draw(st.integers(1, len(headers) - 1))
    previous = headers[at - 1]
    if forgery == "repeat":
        headers.insert(at, dict(previous))
    elif forgery == "backwards":
        headers[at] = dict(headers[at], first_index=max(0, previous["first_index"] + previous["count"] - 1))
    elif forgery == "over-declared":
        headers[at] = dict(headers[at], dropped=headers[at]["first_index"] - previous["first_index"]
                           - previous["count"] + 1)
    elif forgery == "seq-skip":
        headers[at] = dict(headers[at], seq=headers[at]["seq"] + 7, flags=0)
    return headers, skipped, forgery, at


@settings(max_examples=100, deadline=None)
@given(case=streams())
def test_continuity_accounts_every_row_and_refuses_forged_messages(case):
    """About 100,000 headers in 100 streams: an honest stream is taken whole and every skipped row is counted
    missing, declared or not (rows + missing = the last index); a repeated, backwards, over-declared or
    out-of-sequence message is refused where it was put, and the refused one changes nothing. (A repeat or
    a step back after an empty message is no forgery at all: it starts where the stream stands.)"""
    headers, skipped, forgery, at = case
    c = wire.Continuity()
    taken, before = 0, None
    try:
        for h in headers:
            before = (c.rows, c.missing, c.next_index, c.last_seq)
            c.take(h)
            taken += 1
    except wire.WireError:
        assert forgery is not None and taken == at, (forgery, taken, at)
        assert (c.rows, c.missing, c.next_index, c.last_seq) == before
        return
    harmless = forgery in ("repeat", "backwards") and headers[at - 1]["count"] == 0
    assert forgery is None or harmless, (forgery, at)
    assert taken == len(headers)
    assert c.rows + c.missing == c.next_index
    if forgery is None:
        assert c.missing == skipped and c.rows == sum(h["count"] for h in headers)


@settings(max_examples=300, deadline=None)
@given(seq=st.integers(0, 2**62), first=st.integers(0, 2**62), count=st.integers(0, 1 << 20),
       flags=st.integers(0, 7), dropped=st.integers(0, 2**40), width=st.integers(1, 64),
       reason=st.one_of(st.none(), st.text(max_size=40)), channels=st.booleans())
def test_a_header_template_gives_the_header_docs_wire_md_specifies(seq, first, count, flags, dropped, width, reason,
                                                                    channels):
    """The constant part packed once and the rest per message: the bytes are one msgpack map holding exactly
    the fields of docs/wire.md with these values (built here by hand, not by the encoder), and
    encode_header gives the same."""
    fixed = dict(stream="split.channels -> merge.channels", width=width, sample_type="cf32", sample_rate=25e3,
                 centre_frequency=156.8e6)
    if channels:
        fixed.update(channels=list(range(width)), channel_frequencies=[156.8e6 + 25e3 * k for k in range(width)])
    values = dict(seq=seq, first_index=first, count=count, flags=flags, dropped=dropped)
    expected = {"version": wire.VERSION, **fixed, **values, **({"reason": reason} if reason is not None else {})}
    for raw in (wire.HeaderTemplate(**fixed).encode(**values, reason=reason),
                wire.encode_header(**values, reason=reason, **fixed)):
        assert msgpack.unpackb(raw, raw=False) == expected
        assert wire.decode_header(raw) == expected


def _outcome(decode, raw):
    try:
        return decode(raw)
    except wire.WireError as error:
        return f"WireError: {error}"


@settings(max_examples=400, deadline=None)
@given(tail=st.dictionaries(st.one_of(st.sampled_from(FIELDS + ["reason"]), st.text(max_size=6)), VALUES,
                            max_size=8),
       cut=st.integers(0, 40), junk=st.binary(max_size=6))
def test_a_header_decoder_gives_what_a_whole_decode_gives(tail, cut, junk):
    """A link's HeaderDecoder, having learned a sender's constant part, unpacks only the rest of each
    header; for any bytes after that part -- well formed, hostile, cut short or followed by junk -- it returns
    exactly what decode_header returns, or refuses with exactly its error."""
    fixed = dict(stream="split.channels -> sink.samples", width=3, sample_type="cf32", sample_rate=25e3,
                 centre_frequency=156.8e6, channels=[0, 1, 2], channel_frequencies=[0.0, 25e3, -25e3])
    template = wire.HeaderTemplate(**fixed)
    decoder = wire.HeaderDecoder()
    good = template.encode(seq=0, first_index=0, count=4)
    assert decoder.decode(good) == wire.decode_header(good)
    prefix = decoder._prefix
    assert prefix and good.startswith(prefix)
    packer = msgpack.Packer(use_bin_type=True)
    body = b"".join(packer.pack(k) + packer.pack(v) for k, v in tail.items())
    for raw in (prefix + body, prefix + body[:cut], prefix + body + junk,
                good, template.encode(seq=1, first_index=4, count=4, reason="r")):
        assert _outcome(decoder.decode, raw) == _outcome(wire.decode_header, raw)
    assert decoder.short_decodes >= 1
