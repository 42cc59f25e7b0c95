"""Sample formats: one encoder and one decoder per format, one scale per integer width.

Inside a flow, samples are complex64 (IQ) or float32 (real audio), full scale
1.0. At the edges (files, pipes, datagrams) they take one of these formats,
named by the SigMF open standard's ``core:datatype`` stems:

=========  ==========================  ============================================
name       one sample                  value (full scale 1.0)
=========  ==========================  ============================================
``cf32``   float32 I, float32 Q        as is
``cf64``   float64 I, float64 Q        as is (rounded to complex64 inside)
``ci16``   int16 I, int16 Q            v / 32768
``ci8``    int8 I, int8 Q              v / 128
``cu8``    uint8 I, uint8 Q            (v - 127.5) / 127.5 [common practice: low-cost receivers]
``f32``    float32 (real)              as is
``s16``    int16 (real)                v / 32768
=========  ==========================  ============================================

Encoding is the inverse: multiply by the same scale, round to nearest and clip
to the integer range (so +1.0 becomes 32767 in ci16, -1.0 becomes -32768).
Multi-byte formats are little-endian unless ``byte_order="big"``.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

import numpy as np

__all__ = ["SampleFormat", "FORMATS", "COMPLEX_FORMATS", "STREAM_TYPES", "ByteOrder", "sample_format"]

ByteOrder = Literal["little", "big"]

#: The sample types that travel inside a flow and on its links (little-endian on the wire).
STREAM_TYPES: dict[str, np.dtype] = {"cf32": np.dtype("<c8"), "f32": np.dtype("<f4")}


@dataclass(frozen=True)
class SampleFormat:
    """One on-the-edge sample format (see the module doc for the table).

    >>> ci16 = FORMATS["ci16"]
    >>> raw = ci16.encode(np.array([0.5 - 0.25j, 1.0 + 0j], np.complex64))
    >>> raw.tolist(), ci16.bytes_per_sample
    ([16384, -8192, 32767, 0], 4)
    >>> ci16.decode(raw.tobytes()).tolist()
    [(0.5-0.25j), (0.999969482421875+0j)]
    """

    name: str
    component: str          # numpy type of one component, native order: "float32", "int16", ...
    is_complex: bool
    scale: float = 1.0      # value = (component + offset) * scale
    offset: float = 0.0

    @property
    def is_integer(self) -> bool:
        return np.dtype(self.component).kind in "iu"

    @property
    def components(self) -> int:
        """Components per sample: 2 for IQ, 1 for real."""
        return 2 if self.is_complex else 1

    @property
    def bytes_per_sample(self) -> int:
        return self.components * np.dtype(self.component).itemsize

    @property
    def sample_type(self) -> str:
        """The in-flow sample type this format decodes to: ``cf32`` or ``f32``."""
        return "cf32" if self.is_complex else "f32"

    def component_dtype(self, byte_order: ByteOrder = "little") -> np.dtype:
        """The numpy dtype of one component in ``byte_order``."""
        base = np.dtype(self.component)
        return base.newbyteorder("<" if byte_order == "little" else ">") if base.itemsize > 1 else base

    def is_plain(self, byte_order: ByteOrder = "little") -> bool:
        """Its bytes in ``byte_order`` are already the samples :meth:`decode` gives (native float32
        components, no offset or scale): they can be read straight into a sample array."""
        return self.component_dtype(byte_order) == np.float32 and not self.offset and self.scale == 1.0

    def decode(self, raw: bytes | memoryview | np.ndarray, byte_order: ByteOrder = "little") -> np.ndarray:
        """Bytes (a whole number of samples) to complex64 or float32 samples, full scale 1.0. Native float32
        components with no offset or scale are viewed, not copied (read-only when ``raw`` is bytes)."""
        values = np.frombuffer(raw, dtype=self.component_dtype(byte_order))
        plain = self.is_plain(byte_order)
        values = values if plain else values.astype(np.float32)
        if self.offset:
            values += np.float32(self.offset)
        if self.scale != 1.0:
            values *= np.float32(self.scale)
        return values.view(np.complex64) if self.is_complex else values

    def encode(self, samples: np.ndarray, byte_order: ByteOrder = "little") -> np.ndarray:
        """Samples (full scale 1.0) to an array of components in this format, ready for ``tofile``."""
        dtype = self.component_dtype(byte_order)
        values = np.asarray(samples, np.complex64 if self.is_complex else np.float32)
        components = values.view(np.float32) if self.is_complex else values
        if not self.is_integer:
            return np.ascontiguousarray(components, dtype=dtype)
        info = np.iinfo(dtype)
        scaled = np.round(components / np.float32(self.scale) - np.float32(self.offset))
        return np.clip(scaled, info.min, info.max).astype(dtype)


FORMATS: dict[str, SampleFormat] = {f.name: f for f in (
    SampleFormat("cf32", "float32", True),
    SampleFormat("cf64", "float64", True),
    SampleFormat("ci16", "int16", True, 1 / 32768),
    SampleFormat("ci8", "int8", True, 1 / 128),
    SampleFormat("cu8", "uint8", True, 1 / 127.5, -127.5),
    SampleFormat("f32", "float32", False),
    SampleFormat("s16", "int16", False, 1 / 32768),
)}

COMPLEX_FORMATS: tuple[str, ...] = tuple(name for name, f in FORMATS.items() if f.is_complex)


def sample_format(name: str) -> SampleFormat:
    """The format called ``name``; ValueError naming the known ones otherwise."""
    try:
        return FORMATS[name]
    except KeyError:
        raise ValueError(f"sample format {name!r} is not one of {', '.join(FORMATS)}") from None
