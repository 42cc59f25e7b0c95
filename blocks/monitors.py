"""Monitors: the channel activity log and the waterfall picture."""

from __future__ import annotations

import csv
import json
import warnings
from pathlib import Path
from typing import IO, Any

import numpy as np

from .block import Block, BlockContext, BlockError, Chunk, Output, Param, Port, StreamInfo

__all__ = ["Activity", "Waterfall"]
from .dsp.activity import ActivityDetector, Event
from .dsp.errors import ParameterError
from .text_tables import render_rows
from .units import format_frequency

DETECTOR_PARAMS = (
    Param("interval", "quantity", "power is measured over this interval", default=0.05, unit="s", minimum=1e-6),
    Param("threshold", "quantity", "a channel is active this far above the noise floor", default=10.0,
          unit="dB", minimum=0.1),
    Param("hysteresis", "quantity", "it turns off only this much below the threshold", default=4.0,
          unit="dB", minimum=0.0),
    Param("min_duration", "quantity", "a change must last this long to count", default=0.1, unit="s",
          minimum=0.0),
)


def _detector(params: dict[str, Any], stream: StreamInfo) -> ActivityDetector:
    try:
        return ActivityDetector(stream.width, stream.sample_rate, interval=params["interval"],
                                threshold=params["threshold"], hysteresis=params["hysteresis"],
                                min_duration=params["min_duration"])
    except ParameterError as error:
        if error.param == "hysteresis":
            raise BlockError(f"hysteresis = {params['hysteresis']:g} dB must be less than threshold = "
                             f"{params['threshold']:g} dB", param="hysteresis") from None
        raise BlockError(str(error), param=error.param) from None


def _channel_labels(stream: StreamInfo) -> tuple[list[int], list[float]]:
    if stream.kind == "channels":
        return list(stream.channels), list(stream.channel_frequencies)
    channel = stream.channels[0] if stream.channels else 0
    return [channel], [stream.centre_frequency]


class Activity(Block):
    type_name = "activity"
    summary = "Log when each channel is busy: power per interval, noise floor, on/off events, duty cycle."
    parameters = DETECTOR_PARAMS + (
        Param("path", "output-path", "events file: .csv or .jsonl (time_s, channel, frequency_hz, "
              "level_dbfs, event)", default="activity.csv"),
    )
    inputs = (Port("channels", "any", "channels from a channelizer (or one channel)"),)

    def output_streams(self, inputs: dict[str, StreamInfo]) -> dict[str, StreamInfo]:
        if not self.params["path"].endswith((".csv", ".jsonl")):
            raise BlockError(f"path = \"{self.params['path']}\" must end in .csv or .jsonl", param="path")
        _detector(self.params, inputs["channels"])
        return {}

    def __init__(self, params: dict[str, Any], context: BlockContext) -> None:
        super().__init__(params, context)
        self.file: IO[str] | None = None
        self.detector: ActivityDetector | None = None
        self.events = 0

    def start(self, inputs: dict[str, StreamInfo]) -> None:
        stream = inputs["channels"]
        self.detector = _detector(self.params, stream)
        self.channels, self.frequencies = _channel_labels(stream)
        self.path, self.file = self.open_output(self.params["path"], "w", newline="")
        self.jsonl = self.path.suffix == ".jsonl"
        if not self.jsonl:
            self.writer = csv.writer(self.file)
            self.writer.writerow(["time_s", "channel", "frequency_hz", "level_dbfs", "event"])

    def _write(self, events: list[Event]) -> None:
        assert self.file is not None
        for e in events:
            row = {"time_s": round(e.time, 6), "channel": self.channels[e.column],
                   "frequency_hz": round(self.frequencies[e.column], 3), "level_dbfs": round(e.level_db, 2),
                   "event": e.kind}
            if self.jsonl:
                self.file.write(json.dumps(row) + "\n")
            else:
                self.writer.writerow(row.values())
            self.events += 1

    def consume(self, port: str, chunk: Chunk) -> Output:
        assert self.detector is not None
        if chunk.dropped:
            self.detector.skip(chunk.dropped)
        self._write(self.detector.process(chunk.data))
        return {}

    def finish(self) -> Output:
        assert self.detector is not None
        self._write(self.detector.finish())
        return {}

    def close(self) -> None:
        if self.file:
            self.file.close()

    def report(self) -> list[str]:
        if self.detector is None:
            return []
        summary = self.detector.summary()
        rows = [[self.channels[c], format_frequency(self.frequencies[c]), f"{100 * s['duty_cycle']:.1f}%",
                 round(s["peak_db"], 1), round(s["mean_db"], 1), round(s["on_level_db"], 1)]
                for c, s in enumerate(summary) if s["duty_cycle"] > 0]
        quiet = len(summary) - len(rows)
        lines = [f"{self.events} events in {self.path}; noise floor {self.detector.floor_db:.1f} dBFS per channel"]
        if rows:
            lines += render_rows(["channel", "frequency", "duty", "peak dBFS", "mean dBFS", "on level"], rows).splitlines()
        if quiet:
            lines.append(f"{quiet} channel{'s' if quiet != 1 else ''} never active")
        if self.detector.gaps:
            lines.append(f"{self.detector.missing} rows missing in {self.detector.gaps} gaps were not measured")
        return lines


#: The most channel edges the waterfall draws as lines; with more, lines every few pixels would hide the band.
MAX_GRID_LINES = 128


class Waterfall(Block):
    type_name = "waterfall"
    summary = "Draw the band's spectrum over time as a PNG, with the channel grid and activity marked."
    parameters = (
        Param("path", "output-path", "the picture (PNG)", default="waterfall.png"),
        Param("fft_size", "int", "frequency resolution: points per spectrum", default=1024, minimum=16,
              maximum=1 << 16),
        Param("rows", "int", "at most this many rows of time in the picture", default=400, minimum=10, maximum=4000),
        Param("title", "str", "title above the picture", default=""),
    ) + DETECTOR_PARAMS
    inputs = (Port("samples", "samples", "the wideband stream to draw"),
              Port("channels", "channels", "the channelizer's output, to mark the grid and activity",
                   required=False))

    def output_streams(self, inputs: dict[str, StreamInfo]) -> dict[str, StreamInfo]:
        try:
            import matplotlib  # noqa: F401
        except ImportError:
            raise BlockError("the waterfall block needs matplotlib: pip install 'bandloom[plots]'") from None
        if "channels" in inputs:
            _detector(self.params, inputs["channels"])
        return {}

    def __init__(self, params: dict[str, Any], context: BlockContext) -> None:
        super().__init__(params, context)
        self.rows: list[np.ndarray] = []        # averaged spectra, oldest first; NaN where input was missing
        self.path: Path | None = None
        self.missing = 0
        self.gaps = 0

    def start(self, inputs: dict[str, StreamInfo]) -> None:
        self.stream = inputs["samples"]
        self.channel_stream = inputs.get("channels")
        self.detector = _detector(self.params, self.channel_stream) if self.channel_stream else None
        n = self.params["fft_size"]
        self.window = np.hanning(n).astype(np.float32)
        self.pending = np.zeros(0, np.complex64)
        self.segments_per_row = 1
        self.row_acc = np.zeros(n)
        self.row_count = 0          # spectra summed into row_acc
        self.row_slots = 0          # segments of time the row has covered, measured or missing
        self.total = 0
        self.skip_next = 0          # samples to skip so that segments stay aligned to multiples of fft_size
        # Activity as time bins x channels (True = on), from the detector's on/off events, folded
        # like the rows so memory stays bounded however long the stream.
        self.bin_seconds = self.detector.interval if self.detector else 1.0
        self.bins = np.zeros((0, self.channel_stream.width if self.channel_stream else 0), bool)
        self.on_since: dict[int, float] = {}

    def _fold_rows(self) -> None:
        # keep memory bounded: merge neighbouring rows and double the averaging (a missing row is NaN)
        even = len(self.rows) // 2 * 2
        pairs = np.array(self.rows[:even]).reshape(even // 2, 2, -1)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)        # both rows of a pair missing: NaN
            merged = np.nanmean(pairs, axis=1)
        self.rows = list(merged) + self.rows[even:]
        self.segments_per_row *= 2

    def _add_segment(self, spectrum: np.ndarray | None) -> None:
        """One segment of time: its spectrum, or None where the input was missing."""
        if spectrum is not None:
            self.row_acc += spectrum
            self.row_count += 1
        self.row_slots += 1
        if self.row_slots == self.segments_per_row:
            n = self.params["fft_size"]
            self.rows.append(self.row_acc / self.row_count if self.row_count else np.full(n, np.nan))
            self.row_acc = np.zeros(n)
            self.row_count = 0
            self.row_slots = 0
            if len(self.rows) > self.params["rows"]:
                self._fold_rows()

    def _mark(self, events: list[Event]) -> None:
        for event in events:
            if event.kind == "on":
                self.on_since[event.column] = event.time
                continue
            since = self.on_since.pop(event.column, None)
            if since is None:
                continue
            while True:
                # the event times are whole intervals: 0.6 / 0.05 is 11.999999999999998, which is bin 12
                first = int(np.floor(since / self.bin_seconds + 1e-9))
                last = max(int(np.ceil(event.time / self.bin_seconds - 1e-9)), 1)
                if last <= self.params["rows"]:
                    break
                self._fold_bins()
            if last > len(self.bins):
                self.bins = np.concatenate([self.bins, np.zeros((last - len(self.bins), self.bins.shape[1]), bool)])
            self.bins[first:last, event.column] = True

    def _fold_bins(self) -> None:
        if len(self.bins) % 2:
            self.bins = np.concatenate([self.bins, np.zeros((1, self.bins.shape[1]), bool)])
        self.bins = self.bins[0::2] | self.bins[1::2]
        self.bin_seconds *= 2

    def consume(self, port: str, chunk: Chunk) -> Output:
        if port == "channels":
            assert self.detector is not None
            if chunk.dropped:
                self.detector.skip(chunk.dropped)
            self._mark(self.detector.process(chunk.data))
            return {}
        n = self.params["fft_size"]
        data = chunk.data
        if chunk.dropped:
            # segments the gap touches are missing; the next whole segment starts at a multiple of n
            self.gaps += 1
            self.missing += chunk.dropped
            gap_start = chunk.first_index - chunk.dropped
            resume = -(-chunk.first_index // n) * n
            for _ in range(gap_start // n, resume // n):
                self._add_segment(None)
            self.pending = np.zeros(0, np.complex64)
            self.skip_next = resume - chunk.first_index
        if self.skip_next:
            taken = min(self.skip_next, len(data))
            data = data[taken:]
            self.skip_next -= taken
        data = np.concatenate([self.pending, data]) if len(self.pending) else data
        count = len(data) // n
        if count:
            segments = data[:count * n].reshape(count, n) * self.window
            spectra = np.abs(np.fft.fftshift(np.fft.fft(segments, axis=1), axes=1)) ** 2
            for spectrum in spectra:
                self._add_segment(spectrum)
        self.pending = data[count * n:].copy()
        self.total += chunk.count
        return {}

    def finish(self) -> Output:
        if self.detector is not None:
            self._mark(self.detector.finish())
        return {}

    def close(self) -> None:
        if not self.rows:
            return
        import matplotlib
        matplotlib.use("Agg")
        import matplotlib.pyplot as plt
        from matplotlib.patches import Rectangle

        n = self.params["fft_size"]
        rate, centre = self.stream.sample_rate, self.stream.centre_frequency
        # normalise so a full-scale carrier reads 0 dBFS
        power = np.array(self.rows) / (np.sum(self.window) ** 2)
        level = np.ma.masked_invalid(10 * np.log10(np.maximum(power, 1e-20)))      # gaps: masked, drawn blank
        duration = len(self.rows) * self.segments_per_row * n / rate
        floor = float(np.nanpercentile(level.filled(np.nan), 20)) if level.count() else -100.0
        fig, ax = plt.subplots(figsize=(11, 6.5), dpi=100)
        lo, hi = (centre - rate / 2) / 1e6, (centre + rate / 2) / 1e6
        top = max(float(level.max()) if level.count() else floor, floor + 30)
        image = ax.imshow(level, aspect="auto", origin="upper", extent=(lo, hi, duration, 0),
                          vmin=floor - 5, vmax=top, cmap="viridis", interpolation="nearest")
        fig.colorbar(image, ax=ax, label="level per FFT bin (dBFS)")
        cs = self.channel_stream
        if cs is not None and self.detector is not None:
            spacing = cs.channel_spacing
            edges = sorted({round(f - spacing / 2, 3) for f in cs.channel_frequencies})
            for edge in edges if len(edges) <= MAX_GRID_LINES else ():     # beyond that the grid hides the band
                ax.axvline(edge / 1e6, color="white", alpha=0.25, linewidth=0.6)
            step = self.bin_seconds
            for c, f in enumerate(cs.channel_frequencies):
                on = list(self.bins[:, c]) if len(self.bins) else []
                start = None
                for i, flag in enumerate(on + [False]):
                    if flag and start is None:
                        start = i
                    elif not flag and start is not None:
                        ax.add_patch(Rectangle(((f - spacing / 2) / 1e6, start * step), spacing / 1e6,
                                               (i - start) * step, fill=False, edgecolor="orange", linewidth=1.2))
                        start = None
        ax.set_xlim(lo, hi)
        if cs is not None:
            # channel numbers along the top, at their centres; at most about 16 labels however many channels
            order = sorted(zip(cs.channel_frequencies, cs.channels))
            step_label = max(1, int(np.ceil(len(order) / 16)))
            shown = [order[i] for i in range(0, len(order), step_label)]
            top_axis = ax.secondary_xaxis("top")
            top_axis.set_xticks([f / 1e6 for f, _ in shown], [str(k) for _, k in shown])
            top_axis.set_xlabel("channel (FFT order)")
        ax.set_xlabel("frequency (MHz)")
        ax.set_ylabel("time (s)")
        title = self.params["title"] or f"{self.context.name}: {format_frequency(centre)}, " \
                                         f"{format_frequency(rate)} wide"
        grid = "channel grid in white, " if cs is not None and cs.width <= MAX_GRID_LINES else ""
        ax.set_title(title + (f"\n{grid}detected activity in orange" if cs is not None else ""))
        fig.tight_layout()
        self.path, handle = self.open_output(self.params["path"])
        with handle:
            fig.savefig(handle, format="png")
        plt.close(fig)

    def report(self) -> list[str]:
        gaps = f"; {self.missing} samples missing in {self.gaps} gaps left blank" if self.gaps else ""
        return [f"drew {len(self.rows)} rows to {self.path or '?'}{gaps}"]
