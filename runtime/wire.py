"""The wire format of bandloom links (specified for outsiders in docs/wire.md).

A message is two ZeroMQ frames: a msgpack map (the header) and the raw
sample buffer, little-endian, rows one after another. Decoding treats every
byte as untrusted: the header's size is checked before unpacking, msgpack
runs with limits and no extension types, every field is checked, the sample
type comes from a whitelist, and ``count * width * item size`` must equal the
payload's length. Nothing is ever unpickled or evaluated.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import msgpack
import numpy as np
from bandloom.blocks.sample_formats import STREAM_TYPES

__all__ = ["Continuity", "FLAG_DISCONTINUITY", "FLAG_END", "FLAG_REFUSED", "HEADER_LIMIT", "HeaderDecoder",
           "HeaderTemplate",
           "MAX_CREDIT", "MAX_ROWS", "REQUEST_LIMIT", "Request", "SAMPLE_TYPES", "VERSION", "WireError",
           "decode_header", "decode_payload", "decode_request", "encode_header", "encode_request"]

VERSION = 1
HEADER_LIMIT = 64 * 1024
FLAG_END = 1
FLAG_DISCONTINUITY = 2
FLAG_REFUSED = 4             # endpoints: this consumer is turned away (another is attached); ``reason`` says why
REQUEST_LIMIT = 256          # bytes of a consumer's request, at most
MAX_CREDIT = 1 << 16         # messages a consumer may ask for ahead
SAMPLE_TYPES = STREAM_TYPES
MAX_ROWS = 1 << 28

_REQUIRED = {
    "version": int, "stream": str, "seq": int, "first_index": int, "count": int, "width": int,
    "sample_type": str, "sample_rate": float, "centre_frequency": float, "flags": int,
}
_PER_MESSAGE = ("seq", "first_index", "count", "flags", "dropped")      # what changes from message to message
_CHANGING = frozenset(_PER_MESSAGE + ("reason",))
_OPTIONAL = {"dropped": int, "channels": list, "channel_frequencies": list, "reason": str}


class WireError(ValueError):
    """A message that does not follow docs/wire.md; the text says which field and why."""


def encode_header(*, stream: str, seq: int, first_index: int, count: int, width: int, sample_type: str,
                  sample_rate: float, centre_frequency: float, flags: int = 0, dropped: int = 0,
                  channels: list[int] | None = None, channel_frequencies: list[float] | None = None,
                  reason: str | None = None) -> bytes:
    """The header frame of a message (docs/wire.md), msgpack-encoded. A link that sends many messages keeps
    a :class:`HeaderTemplate` instead, which this is one use of."""
    template = HeaderTemplate(stream=stream, width=width, sample_type=sample_type, sample_rate=sample_rate,
                              centre_frequency=centre_frequency, channels=channels,
                              channel_frequencies=channel_frequencies)
    return template.encode(seq=seq, first_index=first_index, count=count, flags=flags, dropped=dropped, reason=reason)


class HeaderTemplate:
    """A link's headers with their constant part (stream, rates, channel lists) packed once: each message
    packs only what changes (a msgpack map; the order of its keys is not part of the format), in about a
    microsecond where re-packing a 1024-channel list took about 120.

    >>> fixed = dict(stream="s", width=2, sample_type="cf32", sample_rate=8e3, centre_frequency=0.0,
    ...              channels=[0, 1], channel_frequencies=[0.0, 4e3])
    >>> raw = HeaderTemplate(**fixed).encode(seq=3, first_index=64, count=8)
    >>> decode_header(raw) == decode_header(encode_header(seq=3, first_index=64, count=8, **fixed))
    True
    """

    def __init__(self, *, stream: str, width: int, sample_type: str, sample_rate: float, centre_frequency: float,
                 channels: list[int] | None = None, channel_frequencies: list[float] | None = None) -> None:
        constant: dict[str, Any] = {"version": VERSION, "stream": stream, "width": int(width), "sample_type": sample_type,
                                    "sample_rate": float(sample_rate), "centre_frequency": float(centre_frequency)}
        if channels is not None:
            constant["channels"] = [int(c) for c in channels]
            constant["channel_frequencies"] = [float(f) for f in channel_frequencies or ()]
        self._packer = msgpack.Packer(use_bin_type=True)
        self._constant = b"".join(self._packer.pack(key) + self._packer.pack(value) for key, value in constant.items())
        self._entries = len(constant) + len(_PER_MESSAGE)

    def encode(self, *, seq: int, first_index: int, count: int, flags: int = 0, dropped: int = 0,
               reason: str | None = None) -> bytes:
        pack = self._packer.pack
        parts = [self._packer.pack_map_header(self._entries + (reason is not None)), self._constant,
                 pack("seq"), pack(int(seq)), pack("first_index"), pack(int(first_index)), pack("count"),
                 pack(int(count)), pack("flags"), pack(int(flags)), pack("dropped"), pack(int(dropped))]
        if reason is not None:
            parts += [pack("reason"), pack(reason)]
        return b"".join(parts)


def _no_extensions(code: int, data: bytes) -> None:
    raise WireError(f"header uses msgpack extension type {code}, which the format does not allow")


_LIMITS: dict[str, Any] = dict(raw=False, strict_map_key=True, ext_hook=_no_extensions, max_str_len=HEADER_LIMIT,
                               max_bin_len=0, max_array_len=1 << 16, max_map_len=64)


def decode_header(raw: bytes | memoryview) -> dict[str, Any]:
    """Check and unpack a header frame; return the dict or raise WireError."""
    if len(raw) > HEADER_LIMIT:
        raise WireError(f"header is {len(raw)} bytes, more than the {HEADER_LIMIT}-byte limit")
    try:
        header = msgpack.unpackb(bytes(raw), **_LIMITS)
    except WireError:
        raise
    except Exception as error:  # msgpack raises several unrelated types for bad bytes
        raise WireError(f"header is not valid msgpack: {error}") from None
    if not isinstance(header, dict):
        raise WireError(f"header is a msgpack {type(header).__name__}, not a map")
    return _checked(header)


class HeaderDecoder:
    """Decodes one link's headers, unpacking their constant part once. A sender's headers begin with the
    same bytes message after message (stream, rates, and a channel stream's two lists of up to 65536
    entries, which took most of a receiver's time per message to unpack); a header that begins with the
    previous one's constant bytes has only the rest unpacked, and the result is checked as
    :func:`decode_header` checks it (the same dict, the same errors). Any other header is decoded whole,
    and its own constant part learned.

    >>> fixed = dict(stream="s", width=2, sample_type="cf32", sample_rate=8e3, centre_frequency=0.0,
    ...              channels=[0, 1], channel_frequencies=[0.0, 4e3])
    >>> decoder, template = HeaderDecoder(), HeaderTemplate(**fixed)
    >>> [decoder.decode(template.encode(seq=n, first_index=8 * n, count=8))["first_index"] for n in range(3)]
    [0, 8, 16]
    """

    def __init__(self) -> None:
        self._prefix = b""
        self._constant: dict[str, Any] = {}
        self._rest_pairs = 0
        self.short_decodes = 0               # headers of which only the changing part was unpacked

    def decode(self, raw: bytes | memoryview) -> dict[str, Any]:
        """Check and unpack a header frame; return the dict or raise WireError."""
        data = bytes(raw)
        if self._prefix and len(data) <= HEADER_LIMIT and data.startswith(self._prefix):
            header = self._rest(data)
            if header is not None:
                self.short_decodes += 1
                return _checked(header)
        header = decode_header(data)
        self._learn(data)
        return header

    def _rest(self, data: bytes) -> dict[str, Any] | None:
        """The header from its changing part alone; None for anything odd (the whole decode then says
        what is wrong with it)."""
        rest = data[len(self._prefix):]
        unpacker = msgpack.Unpacker(**_LIMITS, max_buffer_size=HEADER_LIMIT)
        unpacker.feed(rest)
        header = dict(self._constant)
        try:
            for _ in range(self._rest_pairs):
                key = unpacker.unpack()
                header[key] = unpacker.unpack()
        except Exception:      # short or bad bytes
            return None
        if unpacker.tell() != len(rest) or not all(isinstance(key, str) for key in header):
            return None        # more than the map holds, or a key msgpack's map would refuse
        return header

    def _learn(self, data: bytes) -> None:
        """Remember the bytes up to the first key that changes between messages, and what they hold."""
        self._prefix, self._constant = b"", {}
        unpacker = msgpack.Unpacker(**_LIMITS, max_buffer_size=HEADER_LIMIT)
        unpacker.feed(data)
        try:
            pairs = unpacker.read_map_header()
            constant: dict[str, Any] = {}
            for done in range(pairs):
                start = unpacker.tell()
                key = unpacker.unpack()
                if key in _CHANGING:
                    if done:
                        self._prefix, self._constant, self._rest_pairs = data[:start], constant, pairs - done
                    return
                constant[key] = unpacker.unpack()
        except Exception:  # it was decoded whole above; nothing to learn from an odd one
            return


def _checked(header: dict[str, Any]) -> dict[str, Any]:
    """The field checks of docs/wire.md on an unpacked header map."""
    for key, kind in _REQUIRED.items():
        if key not in header:
            raise WireError(f"header lacks the field {key!r}")
        value = header[key]
        if kind is float and isinstance(value, int) and not isinstance(value, bool):
            value = header[key] = float(value)
        if isinstance(value, bool) or not isinstance(value, kind):
            raise WireError(f"header field {key!r} is {value!r}, not a {kind.__name__}")
    for key, kind in _OPTIONAL.items():
        if key in header and (isinstance(header[key], bool) or not isinstance(header[key], kind)):
            raise WireError(f"header field {key!r} is {header[key]!r}, not a {kind.__name__}")
    if header["version"] != VERSION:
        raise WireError(f"header version {header['version']} is not the supported version {VERSION}")
    if header["sample_type"] not in SAMPLE_TYPES:
        raise WireError(f"sample_type {header['sample_type']!r} is not one of {sorted(SAMPLE_TYPES)}")
    if not 0 <= header["count"] <= MAX_ROWS:
        raise WireError(f"count {header['count']} is outside 0 .. {MAX_ROWS}")
    if not 1 <= header["width"] <= 1 << 16:
        raise WireError(f"width {header['width']} is outside 1 .. 65536")
    if header["first_index"] < 0 or header["seq"] < 0 or header.get("dropped", 0) < 0:
        raise WireError("first_index, seq and dropped must not be negative")
    if not (math.isfinite(header["sample_rate"]) and header["sample_rate"] > 0):
        raise WireError(f"sample_rate {header['sample_rate']!r} is not a positive number")
    if "channels" in header and len(header["channels"]) != header["width"]:
        raise WireError(f"channels lists {len(header['channels'])} entries for width {header['width']}")
    header.setdefault("dropped", 0)
    return header


@dataclass
class Continuity:
    """Where a received stream stands, checked message by message against the rules of docs/wire.md.

    ``next_index`` is the absolute index after the last row received (or counted missing). A message must
    start at or after it (rows in between are its gap, counted in ``missing``, and in ``undeclared`` when
    the header's ``dropped`` did not say so); must not declare more rows dropped than it skipped; and must
    carry the sequence number after the last one, unless it is flagged as a discontinuity (a sender that
    restarted begins a new count). :meth:`take` raises WireError for a message that breaks a rule and
    changes nothing then.

    >>> c = Continuity()
    >>> c.take(dict(seq=0, first_index=0, count=4, dropped=0, flags=0)), c.take(dict(seq=1, first_index=6,
    ...        count=2, dropped=2, flags=FLAG_DISCONTINUITY)), (c.rows, c.missing, c.next_index)
    (0, 2, (6, 2, 8))
    """

    next_index: int = 0
    last_seq: int = -1
    rows: int = 0
    missing: int = 0
    undeclared: int = 0
    gaps: int = 0

    def take(self, header: dict[str, Any]) -> int:
        """Account for one decoded header; return its gap (rows missing just before it)."""
        first, count, seq = header["first_index"], header["count"], header["seq"]
        if first < self.next_index:
            raise WireError(f"message {seq} starts at row {first}, before the {self.next_index} rows already "
                            f"received")
        gap = first - self.next_index
        if header["dropped"] > gap:
            raise WireError(f"message {seq} declares {header['dropped']} rows dropped but follows on after "
                            f"{gap}")
        if self.last_seq >= 0 and seq != self.last_seq + 1 and not header["flags"] & FLAG_DISCONTINUITY:
            raise WireError(f"message {seq} follows message {self.last_seq}: a message was lost, repeated or "
                            f"reordered without a discontinuity")
        self.last_seq = seq
        self.next_index = first + count
        self.rows += count
        self.missing += gap
        self.undeclared += gap - header["dropped"]
        self.gaps += bool(gap)
        return gap


def decode_payload(header: dict[str, Any], payload: bytes | memoryview) -> np.ndarray:
    """The payload as a numpy array viewing the frame's buffer (1-D if width 1, else 2-D)."""
    dtype = SAMPLE_TYPES[header["sample_type"]]
    expected = header["count"] * header["width"] * dtype.itemsize
    if len(payload) != expected:
        raise WireError(f"payload is {len(payload)} bytes; count {header['count']} x width "
                        f"{header['width']} x {dtype.itemsize} bytes says {expected}")
    array = np.frombuffer(payload, dtype=dtype)
    if header["width"] > 1:
        array = array.reshape(header["count"], header["width"])
    return array


@dataclass(frozen=True)
class Request:
    """What an endpoint's consumer sends (docs/wire.md, "Endpoints"): ``credit`` more messages it can take,
    ``ack`` the ``seq`` of the last message it has processed (every earlier one too), ``bye`` when it leaves."""

    credit: int = 0
    ack: int | None = None
    bye: bool = False


def encode_request(credit: int = 0, *, ack: int | None = None, bye: bool = False) -> bytes:
    values: dict[str, Any] = {"credit": int(credit)}
    if ack is not None:
        values["ack"] = int(ack)
    if bye:
        values["bye"] = True
    return msgpack.packb(values, use_bin_type=True)


def decode_request(raw: bytes | memoryview) -> Request:
    """Check and unpack a consumer's request; raise WireError naming what is wrong."""
    if len(raw) > REQUEST_LIMIT:
        raise WireError(f"request is {len(raw)} bytes, more than the {REQUEST_LIMIT}-byte limit")
    try:
        values = msgpack.unpackb(bytes(raw), raw=False, strict_map_key=True, ext_hook=_no_extensions,
                                 max_str_len=16, max_bin_len=0, max_array_len=0, max_map_len=3)
    except WireError:
        raise
    except Exception as error:
        raise WireError(f"request is not valid msgpack: {error}") from None
    if not isinstance(values, dict) or not set(values) <= {"credit", "ack", "bye"}:
        raise WireError("request must be a map with only the keys credit, ack and bye")
    credit, ack, bye = values.get("credit", 0), values.get("ack"), values.get("bye", False)
    if isinstance(credit, bool) or not isinstance(credit, int) or not 0 <= credit <= MAX_CREDIT:
        raise WireError(f"request credit {credit!r} is not a whole number 0 .. {MAX_CREDIT}")
    if ack is not None and (isinstance(ack, bool) or not isinstance(ack, int) or ack < 0):
        raise WireError(f"request ack {ack!r} is not a message number (seq)")
    if not isinstance(bye, bool):
        raise WireError(f"request bye {bye!r} is not true or false")
    return Request(credit, ack, bye)
