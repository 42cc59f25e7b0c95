"""The channelizer block (polyphase analysis bank) and the synthesis block (its inverse)."""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np

from ._bank_params import DESIGN_KEYS, DESIGN_PARAMS, make_design
from .block import Block, BlockError, Chunk, Output, Param, Port, StreamInfo
from .dsp.banks import signed_channel
from .dsp.design import BankDesign
from .dsp.mixing import shift_frequency
from .params import MAX_CHANNELS

__all__ = ["Channelizer", "Synthesis"]


THREADS = Param("threads", "int", "threads that share the bank's work, with output identical to one thread; they "
               "pay off for chunks of 256 Ki input samples or more (the source's chunk_size)", default=1, minimum=1,
               maximum=64)


def _warm_banks() -> None:
    """Load the banks' compiled kernels (numba's cache) and run each once on a few samples."""
    from .dsp.banks import AnalysisBank, SynthesisBank

    taps = np.full(8, 1 / 8)
    frames = AnalysisBank(4, 2, taps).process(np.ones(16, dtype=np.complex64))
    SynthesisBank(4, 2, taps).process(frames)


class Channelizer(Block):
    type_name = "channelizer"
    summary = "Split a wideband IQ stream into equally spaced channels (polyphase filter bank)."
    parameters = (
        Param("channels", "int", "number of channels M; channel k is centred k*rate/M from the "
              "centre frequency (k >= M/2 counts down from the top: FFT order)", minimum=2,
              maximum=MAX_CHANNELS),
        Param("oversample", "int", "channel rate as a multiple of the channel spacing (M / decimation); "
              "2 or more for exact reconstruction", default=2, minimum=1, maximum=64),
        Param("grid_offset", "quantity", "put the channel raster's centre this far from the stream's centre "
              "frequency (the band is shifted before the bank)", default=0.0, unit="Hz"),
        THREADS,
    ) + DESIGN_PARAMS
    inputs = (Port("samples", "samples", "wideband IQ"),)
    outputs = (Port("channels", "channels", "all channels side by side; links pick channels with 'select'"),)

    @classmethod
    def preload(cls) -> None:
        _warm_banks()

    def _design(self) -> BankDesign:
        return make_design(self.params["channels"], self.params["oversample"], self.params,
                           folder=self.context.design_folder)

    def output_streams(self, inputs: dict[str, StreamInfo]) -> dict[str, StreamInfo]:
        design = self._design()
        wide = inputs["samples"]
        grid = self.params.get("grid_offset") or 0.0
        if abs(grid) >= wide.sample_rate / 2:
            raise BlockError(f"grid_offset = {grid:g} Hz is outside the band (+-{wide.sample_rate / 2:g} Hz)",
                             param="grid_offset")
        offsets = np.fft.fftfreq(design.channels) * wide.sample_rate + grid
        knobs = {k: self.params.get(k) for k in DESIGN_KEYS}
        knobs.update(channels=design.channels, oversample=design.oversampling, grid_offset=grid)
        return {"channels": StreamInfo(
            "channels", "cf32", wide.sample_rate / design.decimation, wide.centre_frequency,
            channels=tuple(range(design.channels)),
            channel_frequencies=tuple(float(wide.centre_frequency + f) for f in offsets),
            channel_count=design.channels, channel_spacing=wide.sample_rate / design.channels,
            design=knobs, start_time=wide.start_time)}

    def start(self, inputs: dict[str, StreamInfo]) -> None:
        self.bank = self._design().analysis_bank(threads=self.params["threads"])
        self.shift = (self.params.get("grid_offset") or 0.0) / inputs["samples"].sample_rate

    def consume(self, port: str, chunk: Chunk) -> Output:
        if self.shift:
            chunk = Chunk(shift_frequency(chunk.data, chunk.first_index, -self.shift), chunk.first_index,
                          chunk.discontinuity, chunk.dropped)
        out = []
        if chunk.dropped:
            # Missing input is zeros in absolute time; frames that saw only the
            # gap are skipped, so the next chunk's first_index jumps past them.
            first = self.bank.frames_produced
            edge = self.bank.skip(chunk.dropped)
            if len(edge):
                out.append(Chunk(edge, first))
        first = self.bank.frames_produced
        room = None
        if not out and self.context.output_room is not None:     # frames made where they are sent from
            room = self.context.output_room("channels", (self.bank.frames_for(len(chunk.data)), self.bank.channels),
                                            np.dtype(np.complex64))
        out.append(Chunk(self.bank.process(chunk.data, out=room), first))
        return {"channels": out}


    def end_index(self, port: str) -> int:
        return self.bank.frames_produced


@dataclass(frozen=True)
class _Group:
    """A group of adjacent channels merged by a bank of its own: ``channels`` = the group's width times the
    oversampling, ``rate`` its output rate (Hz), ``centre`` the RF frequency of the group's centre (midway
    between its outer channels), ``positions`` each input column's channel in the group's bank (0 = the
    group's middle channel), ``offset`` the centre's distance above that channel's centre (Hz)."""

    channels: int
    rate: float
    centre: float
    positions: tuple[int, ...]
    offset: float
    design: BankDesign


class Synthesis(Block):
    type_name = "synthesis"
    summary = "Merge channels from a channelizer back into one wideband stream (polyphase synthesis)."
    parameters = (
        Param("oversample", "int", "must match the channelizer; default: the channelizer's",
              default=None, minimum=1, maximum=64),
        Param("output", "choice", "'band': the channelizer's whole input band at its rate; 'group': only the "
              "linked channels, which must be adjacent, at the group's own rate (channels x oversample channel "
              "spacings) and centred on the group, from a bank of that size", default="band",
              choices=("band", "group")),
        THREADS,
    ) + tuple(replace(p, doc=p.doc.split(" (default")[0] + " (default: the channelizer's)", default=None)
              for p in DESIGN_PARAMS)
    inputs = (Port("channels", "channels", "channels from a channelizer; missing channels count as silence"),)
    outputs = (Port("samples", "samples", "wideband IQ at the channelizer's input rate, delayed by "
                    "the design's round-trip delay"),)

    @classmethod
    def preload(cls) -> None:
        _warm_banks()

    def _design(self, stream: StreamInfo) -> BankDesign:
        knobs = dict(stream.design)
        for key in ("oversample",) + DESIGN_KEYS:
            if self.params.get(key) is not None:
                knobs[key] = self.params[key]
        if not stream.channel_count:
            raise BlockError("the input does not come from a channelizer", port="channels")
        return make_design(stream.channel_count, knobs.get("oversample") or 2, knobs, folder=self.context.design_folder)

    def output_streams(self, inputs: dict[str, StreamInfo]) -> dict[str, StreamInfo]:
        stream = inputs["channels"]
        if stream.kind != "channels":
            raise BlockError("expects a channels stream (several channels side by side); the link "
                             "selects a single channel — select two or more, or 'all'", port="channels")
        design = self._design(stream)
        band_rate = stream.channel_spacing * stream.channel_count
        if band_rate and abs(stream.sample_rate * design.decimation - band_rate) > 1e-9 * band_rate:
            from .units import format_frequency
            raise BlockError(f"sample-rate mismatch: the channels arrive at {format_frequency(stream.sample_rate)}, "
                             f"but oversample = {design.oversampling} expects "
                             f"{format_frequency(band_rate / design.decimation)} (the channelizer's "
                             f"oversample is {stream.design.get('oversample')}); leave oversample out to match it",
                             param="oversample")
        if self.params.get("output") == "group":
            group = self._group(stream, design)
            return {"samples": StreamInfo("samples", "cf32", group.rate, group.centre, start_time=stream.start_time,
                                          design={"round_trip_delay": design.delay * group.channels
                                                  // design.channels})}
        return {"samples": StreamInfo("samples", "cf32", stream.sample_rate * design.decimation,
                                      stream.centre_frequency, start_time=stream.start_time,
                                      design={"round_trip_delay": design.delay})}

    def _group(self, stream: StreamInfo, design: BankDesign) -> _Group:
        """The bank that merges the linked channels on their own (see :class:`_Group`)."""
        m, p = design.channels, design.oversampling
        if p < 2:
            raise BlockError("output = \"group\" needs an oversampled channelizer (oversample >= 2): a critically "
                             "sampled bank does not reconstruct exactly", param="output")
        signed = sorted(signed_channel(k, m) for k in stream.channels)
        if signed != list(range(signed[0], signed[0] + len(signed))):
            raise BlockError(f"output = \"group\" merges adjacent channels; the link brings channels "
                             f"{', '.join(str(k % m) for k in signed)}, which have gaps between them", param="output")
        size = len(signed) * p
        middle = signed[len(signed) // 2]
        knobs = {k: stream.design.get(k) for k in DESIGN_KEYS}
        knobs.update({k: self.params[k] for k in DESIGN_KEYS if self.params.get(k) is not None})
        spacing = stream.channel_spacing
        frequency = dict(zip(stream.channels, stream.channel_frequencies))
        centre = (frequency[signed[0] % m] + frequency[signed[-1] % m]) / 2
        return _Group(channels=size, rate=spacing * size, centre=centre,
                      positions=tuple((signed_channel(k, m) - middle) % size for k in stream.channels),
                      offset=(centre - frequency[middle % m]),
                      design=make_design(size, p, knobs, folder=self.context.design_folder))

    def start(self, inputs: dict[str, StreamInfo]) -> None:
        stream = inputs["channels"]
        self.design = self._design(stream)
        self.columns = np.asarray(stream.channels)
        self.shift = (stream.design.get("grid_offset") or 0.0) / (stream.sample_rate * self.design.decimation)
        if self.params.get("output") == "group":
            group = self._group(stream, self.design)
            # the group's bank: its channel 0 is the group's middle channel; then the output moves down by
            # the offset of the group's centre from that channel's centre
            self.design = group.design
            self.columns = np.asarray(group.positions)
            self.shift = -group.offset / group.rate
        self.bank = self.design.synthesis_bank(threads=self.params["threads"])

    def consume(self, port: str, chunk: Chunk) -> Output:
        out = []
        if chunk.dropped:
            first = self.bank.frames_consumed * self.design.decimation
            edge = self.bank.skip(chunk.dropped)
            if len(edge):
                out.append(Chunk(edge, first))
        first = self.bank.frames_consumed * self.design.decimation
        frames = np.zeros((chunk.count, self.design.channels), dtype=np.complex64)
        frames[:, self.columns] = chunk.data.reshape(chunk.count, -1)
        out.append(Chunk(self.bank.process(frames), first))
        if self.shift:
            out = [Chunk(shift_frequency(c.data, c.first_index, self.shift), c.first_index) for c in out]
        return {"samples": out}

    def end_index(self, port: str) -> int:
        return self.bank.frames_consumed * self.design.decimation
