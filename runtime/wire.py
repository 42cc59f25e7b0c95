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
from typing import Any

import msgpack
import numpy as np
from bandloom.blocks.sample_formats import STREAM_TYPES

__all__ = ["FLAG_DISCONTINUITY", "FLAG_END", "HEADER_LIMIT", "MAX_ROWS", "SAMPLE_TYPES", "VERSION", "WireError",
           "decode_header", "decode_payload", "encode_header"]

VERSION = 1
HEADER_LIMIT = 64 * 1024
FLAG_END = 1
FLAG_DISCONTINUITY = 2
SAMPLE_TYPES = STREAM_TYPES
MAX_ROWS = 1 << 28

_REQUIRED = {
    "version": int, "stream": str, "seq": int, "first_index": int, "count": int, "width": int,
    "sample_type": str, "sample_rate": float, "centre_frequency": float, "flags": int,
}
_OPTIONAL = {"dropped": int, "channels": list, "channel_frequencies": list}


class WireError(ValueError):
    """A message that does not follow docs/wire.md; the text says which field and why."""


def encode_header(*, stream: str, seq: int, first_index: int, count: int, width: int, sample_type: str,
                  sample_rate: float, centre_frequency: float, flags: int = 0, dropped: int = 0,
                  channels: list[int] | None = None, channel_frequencies: list[float] | None = None) -> bytes:
    """The header frame of a message (docs/wire.md), msgpack-encoded."""
    header = {
        "version": VERSION, "stream": stream, "seq": int(seq), "first_index": int(first_index),
        "count": int(count), "width": int(width), "sample_type": sample_type,
        "sample_rate": float(sample_rate), "centre_frequency": float(centre_frequency),
        "flags": int(flags), "dropped": int(dropped),
    }
    if channels is not None:
        header["channels"] = [int(c) for c in channels]
        header["channel_frequencies"] = [float(f) for f in channel_frequencies or ()]
    return msgpack.packb(header, use_bin_type=True)


def _no_extensions(code: int, data: bytes) -> None:
    raise WireError(f"header uses msgpack extension type {code}, which the format does not allow")


def decode_header(raw: bytes | memoryview) -> dict[str, Any]:
    """Check and unpack a header frame; return the dict or raise WireError."""
    if len(raw) > HEADER_LIMIT:
        raise WireError(f"header is {len(raw)} bytes, more than the {HEADER_LIMIT}-byte limit")
    try:
        header = msgpack.unpackb(bytes(raw), raw=False, strict_map_key=True, ext_hook=_no_extensions,
                                 max_str_len=HEADER_LIMIT, max_bin_len=0, max_array_len=1 << 16,
                                 max_map_len=64)
    except WireError:
        raise
    except Exception as error:  # msgpack raises several unrelated types for bad bytes
        raise WireError(f"header is not valid msgpack: {error}") from None
    if not isinstance(header, dict):
        raise WireError(f"header is a msgpack {type(header).__name__}, not a map")
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
