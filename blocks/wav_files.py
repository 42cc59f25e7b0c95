"""WAV files: IQ from two-channel WAV (I left, Q right) [common practice], and audio to WAV."""

from __future__ import annotations

import os
import warnings
import wave
from pathlib import Path
from typing import Any

import numpy as np

from .block import Block, BlockContext, BlockError, Chunk, Loss, Output, Param, Port, StreamInfo
from .params import shortened
from .sample_formats import FORMATS
from .units import format_frequency

__all__ = ["WavReader", "WavWriter"]

_SCALE = {np.dtype(np.int16): 1 / 32768, np.dtype(np.int32): 1 / 2147483648, np.dtype(np.uint8): 1 / 128,
          np.dtype(np.float32): 1.0, np.dtype(np.float64): 1.0}


class WavReader(Block):
    type_name = "wav-reader"
    summary = "Read IQ from a two-channel WAV file (I in the first channel, Q in the second)."
    is_source = True
    parameters = (
        Param("path", "input-path", "the WAV file, relative to the flow file's folder"),
        Param("centre_frequency", "quantity", "RF frequency at 0 Hz of the recording", default=0.0, unit="Hz"),
        Param("chunk_size", "int", "samples per message", default=65536, minimum=1, maximum=1 << 24),
    )
    outputs = (Port("samples", "samples", "IQ samples, full scale 1.0"),)

    def _open(self) -> tuple[int, np.ndarray]:
        import scipy.io.wavfile
        path = self.context.input_path(self.params["path"])
        try:
            with warnings.catch_warnings(record=True) as caught:
                warnings.simplefilter("always")
                rate, data = scipy.io.wavfile.read(path, mmap=True)
        except OSError as error:
            raise BlockError(f"cannot read {path}: {error.strerror or error}", param="path") from None
        except Exception as error:  # scipy's parser raises many kinds for a damaged file (struct.error, ZeroDivisionError, ...)
            reason = shortened(str(error)) or type(error).__name__
            raise BlockError(f"cannot read {path} as WAV ({reason}): not a WAV file, or a damaged one",
                             param="path") from None
        for warning in caught:                   # samples missing that the header promised: refused, not cut quietly
            if "prematurely" in str(warning.message):
                raise BlockError(f"{path} is cut short: {shortened(str(warning.message), 160)}", param="path")
        if data.ndim != 2 or data.shape[1] != 2:
            channels = 1 if data.ndim == 1 else data.shape[1]
            raise BlockError(f"{path} has {channels} channel{'s' if channels != 1 else ''}; IQ needs exactly 2 "
                             f"(I and Q)", param="path")
        if data.dtype not in _SCALE:
            raise BlockError(f"{path} holds {data.dtype} samples, which this reader does not take", param="path")
        return rate, data

    def output_streams(self, inputs: dict[str, StreamInfo]) -> dict[str, StreamInfo]:
        rate, _ = self._open()
        return {"samples": StreamInfo("samples", "cf32", float(rate), self.params["centre_frequency"])}

    def start(self, inputs: dict[str, StreamInfo]) -> None:
        _, self.data = self._open()
        self.scale = _SCALE[self.data.dtype]
        self.offset = -128 if self.data.dtype == np.uint8 else 0
        self.index = 0

    def progress(self) -> tuple[int, int]:
        return self.index, len(self.data)

    def produce(self) -> Output | None:
        if self.stopping or self.index >= len(self.data):
            return None
        part = np.asarray(self.data[self.index:self.index + self.params["chunk_size"]], dtype=np.float32)
        iq = ((part[:, 0] + self.offset) + 1j * (part[:, 1] + self.offset)) * self.scale
        chunk = Chunk(iq.astype(np.complex64), self.index)
        self.index += len(part)
        return {"samples": [chunk]}


class WavWriter(Block):
    type_name = "wav-writer"
    summary = "Write audio to a 16-bit PCM WAV file (mono; IQ input gives stereo I/Q)."
    parameters = (
        Param("path", "output-path", "the WAV file; may use {channel}, {frequency}, {frequency_mhz}"),
        Param("gain", "float", "multiply by this before writing (1.0 = full scale)", default=1.0, minimum=-1e6,
              maximum=1e6),
    )
    inputs = (Port("audio", "samples", "audio (f32) or IQ (cf32)", sample_types=("f32", "cf32")),)

    def output_streams(self, inputs: dict[str, StreamInfo]) -> dict[str, StreamInfo]:
        rate = inputs["audio"].sample_rate
        if abs(rate - round(rate)) > 1e-6:
            raise BlockError(f"WAV needs a whole number of samples per second, the input runs at "
                             f"{format_frequency(rate)}; put a resample block before it", port="audio")
        return {}

    def __init__(self, params: dict[str, Any], context: BlockContext) -> None:
        super().__init__(params, context)
        self.file: wave.Wave_write | None = None
        self.path: Path | None = None
        self.frames = 0
        self.clipped = 0
        self.zero_filled = 0          # frames of silence written where input was missing
        self.received = 0             # frames of input taken
        self.not_written = 0          # frames taken but not in the file after a failed write
        self.failure = ""

    def start(self, inputs: dict[str, StreamInfo]) -> None:
        stream = inputs["audio"]
        self.stereo = stream.sample_type == "cf32"
        self.pcm = FORMATS["ci16" if self.stereo else "s16"]
        self.path, self.raw = self.open_output(self.params["path"])
        self.file = wave.open(self.raw, "wb")
        self.file.setnchannels(2 if self.stereo else 1)
        self.file.setsampwidth(2)
        self.file.setframerate(int(round(stream.sample_rate)))
        self.file.writeframes(b"")           # the header, now: it is never rewritten in a longer form
        self.header_bytes = self.raw.tell()
        self.frame_bytes = 4 if self.stereo else 2

    def consume(self, port: str, chunk: Chunk) -> Output:
        assert self.file is not None
        self.received += chunk.count
        for piece in chunk.filled_pieces():          # a gap becomes silence of its length, in bounded pieces
            data = piece * self.params["gain"]
            self.clipped += int(np.count_nonzero(np.abs(data.view(np.float32) if self.stereo else data) > 1.0))
            try:
                self.file.writeframes(self.pcm.encode(data).tobytes())
            except OSError as error:
                self.failure = error.strerror or str(error)
                raise
            self.frames += len(data)
        self.zero_filled += chunk.dropped
        return {}

    def close(self) -> None:
        if self.file:
            try:
                self.file.close()       # writes the final sizes into the header (only what was written whole)
            finally:
                self.file = None
                if self.failure:
                    # keep the whole frames written before the failure; count the rest
                    os.ftruncate(self.raw.fileno(), self.header_bytes + self.frames * self.frame_bytes)
                    self.not_written = self.received - (self.frames - self.zero_filled)
                self.raw.close()

    def losses(self) -> list[Loss]:
        if not self.not_written:
            return []
        return [Loss(self.not_written, f"not written to {self.path}: {self.failure}")]

    def report(self) -> list[str]:
        clipped = f", {self.clipped} values clipped" if self.clipped else ""
        gaps = f", {self.zero_filled} of them silence for missing input" if self.zero_filled else ""
        failed = f"; {self.not_written} frames not written ({self.failure})" if self.not_written else ""
        return [f"wrote {self.frames} frames to {self.path or '?'}{gaps}{clipped}{failed}"]
