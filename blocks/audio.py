"""Tuning and audio: frequency shift, rational resampler, FM and AM demodulators."""

from __future__ import annotations

from fractions import Fraction
from typing import Any

import numpy as np

from .block import Block, BlockContext, BlockError, Chunk, Output, Param, Port, StreamInfo
from .dsp.mixing import shift_frequency
from .units import format_frequency

__all__ = ["AMDemod", "FMDemod", "Resample", "Shift", "rational_ratio"]


class Shift(Block):
    type_name = "shift"
    restartable = True                # carries gaps, so a new instance can take over mid-stream
    summary = "Move a signal in frequency: the one at 'offset' from the centre comes down to 0 Hz."
    parameters = (Param("offset", "quantity", "offset from the centre frequency to bring to 0 Hz "
                        "(positive = above the centre)", unit="Hz"),)
    inputs = (Port("samples", "samples", "IQ"),)
    outputs = (Port("samples", "samples", "IQ, centre frequency moved by 'offset'"),)

    def output_streams(self, inputs: dict[str, StreamInfo]) -> dict[str, StreamInfo]:
        s = inputs["samples"]
        if abs(self.params["offset"]) >= s.sample_rate / 2:
            raise BlockError(f"offset = {format_frequency(self.params['offset'])} is outside the stream's "
                             f"+-{format_frequency(s.sample_rate / 2)}", param="offset")
        return {"samples": StreamInfo("samples", "cf32", s.sample_rate, s.centre_frequency + self.params["offset"],
                                      start_time=s.start_time)}

    def start(self, inputs: dict[str, StreamInfo]) -> None:
        self.rate = inputs["samples"].sample_rate
        self.cycles_per_sample = self.params["offset"] / self.rate

    def consume(self, port: str, chunk: Chunk) -> Output:
        return {"samples": [Chunk(shift_frequency(chunk.data, chunk.first_index, -self.cycles_per_sample),
                                  chunk.first_index)]}


def rational_ratio(target: float, rate: float) -> tuple[int, int]:
    """up/down with small terms such that rate * up / down == target, or BlockError."""
    ratio = Fraction(target / rate).limit_denominator(10000)
    if ratio.numerator > 10000 or ratio.numerator == 0 or abs(float(ratio) * rate - target) > 1e-12 * target:
        raise BlockError(f"cannot reach {format_frequency(target)} exactly from {format_frequency(rate)} with a ratio "
                         f"of whole numbers up to 10000", param="rate")
    return ratio.numerator, ratio.denominator


class Resample(Block):
    type_name = "resample"
    restartable = True                # carries gaps, so a new instance can take over mid-stream
    summary = "Change the sample rate by a ratio of whole numbers (same output as scipy's resample_poly)."
    parameters = (Param("rate", "quantity", "the output sample rate; it must be reachable exactly",
                        unit="Hz", minimum=1e-6),)
    inputs = (Port("samples", "samples", "IQ or audio", sample_types=("cf32", "f32")),)
    outputs = (Port("samples", "samples", "the same signal at the new rate", sample_types=("cf32", "f32")),)

    def output_streams(self, inputs: dict[str, StreamInfo]) -> dict[str, StreamInfo]:
        s = inputs["samples"]
        rational_ratio(self.params["rate"], s.sample_rate)
        return {"samples": StreamInfo("samples", s.sample_type, self.params["rate"], s.centre_frequency,
                                      start_time=s.start_time)}

    def __init__(self, params: dict[str, Any], context: BlockContext) -> None:
        super().__init__(params, context)
        self.index = 0                # output index of the next sample
        self.gaps = 0
        self.missing_in = 0           # input samples missing, in all gaps
        self.skipped_out = 0          # output samples left as a gap
        self.edge_out = 0             # output samples computed with part of their input missing (taken as zero)

    def start(self, inputs: dict[str, StreamInfo]) -> None:
        from .dsp.resample import Resampler
        s = inputs["samples"]
        self.dtype = s.dtype
        up, down = rational_ratio(self.params["rate"], s.sample_rate)
        self.resampler = Resampler(up, down)

    def _chunk(self, values: np.ndarray) -> list[Chunk]:
        chunk = Chunk(values.astype(self.dtype), self.index)
        self.index += len(values)
        return [chunk] if len(values) else []

    def consume(self, port: str, chunk: Chunk) -> Output:
        out = []
        if chunk.dropped:
            # A gap of N input samples becomes a gap of about N * up / down output samples; the few
            # outputs whose filter reaches across the gap's start are computed with the gap as zeros.
            edge, skipped = self.resampler.skip(chunk.dropped)
            out += self._chunk(edge)
            self.index += skipped
            self.gaps += 1
            self.missing_in += chunk.dropped
            self.skipped_out += skipped
            self.edge_out += len(edge)
        out += self._chunk(self.resampler.process(chunk.data))
        return {"samples": out}

    def finish(self) -> Output:
        return {"samples": self._chunk(self.resampler.finish())}

    def end_index(self, port: str) -> int:
        return self.index

    def report(self) -> list[str]:
        if not self.gaps:
            return []
        return [f"{self.missing_in} input samples missing in {self.gaps} gaps: {self.skipped_out} output samples "
                f"left as gaps, {self.edge_out} computed with the missing input taken as zero"]


class FMDemod(Block):
    type_name = "fm-demod"
    restartable = True                # carries gaps, so a new instance can take over mid-stream
    summary = "Frequency-demodulate a channel to audio (1.0 = full_scale deviation)."
    parameters = (
        Param("full_scale", "quantity", "deviation that gives audio level 1.0", default=5000.0, unit="Hz",
              minimum=1e-3),
        Param("deemphasis", "quantity", "de-emphasis time constant, 0 for none (750 us is usual for "
              "narrowband voice, 50 or 75 us for broadcast)", default=0.0, unit="s", minimum=0.0),
        Param("squelch", "quantity", "mute the audio while the channel is weaker than this (default: never "
              "mute)", default=None, unit="dBFS"),
    )
    inputs = (Port("samples", "samples", "one channel of IQ, carrier at 0 Hz"),)
    outputs = (Port("audio", "samples", "audio, float32, at the channel rate", sample_types=("f32",)),)

    def output_streams(self, inputs: dict[str, StreamInfo]) -> dict[str, StreamInfo]:
        s = inputs["samples"]
        return {"audio": StreamInfo("samples", "f32", s.sample_rate, s.centre_frequency, channels=s.channels,
                                    channel_frequencies=s.channel_frequencies, start_time=s.start_time)}

    def start(self, inputs: dict[str, StreamInfo]) -> None:
        from .dsp.demod import FMDemodulator
        self.demod = FMDemodulator(inputs["samples"].sample_rate, full_scale=self.params["full_scale"],
                                   deemphasis=self.params["deemphasis"], squelch=self.params["squelch"])

    def consume(self, port: str, chunk: Chunk) -> Output:
        if chunk.dropped:
            self.demod.restart()       # no phase step across a gap: it would be a click
        return {"audio": [Chunk(self.demod.process(chunk.data), chunk.first_index)]}


class AMDemod(Block):
    type_name = "am-demod"
    restartable = True                # carries gaps, so a new instance can take over mid-stream
    summary = "Envelope-demodulate a channel to audio (1.0 = 100 % modulation)."
    parameters = (Param("dc_cutoff", "quantity", "the carrier level is followed below this frequency",
                        default=10.0, unit="Hz", minimum=0.1),)
    inputs = (Port("samples", "samples", "one channel of IQ, carrier at 0 Hz"),)
    outputs = (Port("audio", "samples", "audio, float32, at the channel rate", sample_types=("f32",)),)

    output_streams = FMDemod.output_streams

    def start(self, inputs: dict[str, StreamInfo]) -> None:
        from .dsp.demod import AMDemodulator
        self.demod = AMDemodulator(inputs["samples"].sample_rate, dc_cutoff=self.params["dc_cutoff"])

    def consume(self, port: str, chunk: Chunk) -> Output:
        return {"audio": [Chunk(self.demod.process(chunk.data), chunk.first_index)]}
