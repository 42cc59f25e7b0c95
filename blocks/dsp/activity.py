"""Channel activity: power per interval, a robust noise floor, on/off events with hysteresis.

Input rows are complex samples of C channels (one column each) at ``rate``
rows per second. Every ``interval`` seconds each channel's mean power
``mean |y|^2`` becomes one level in dBFS (full scale: power 1.0).

Noise floor: with 4 or more channels, the median over channels of each
interval's levels (valid while fewer than half the channels are busy), then
the median of the last ``floor_history`` of those; with fewer channels, the
10th percentile of each channel's own last 200 levels. A channel is *above*
when its level is at least ``threshold`` dB over the floor and *below* when it
is under ``threshold - hysteresis``; it turns on after ``min_duration`` of
consecutive *above* intervals (the event is dated at the first of them) and
off after ``min_duration`` of consecutive *below* intervals.

Times are seconds from the stream's first row (index 0). Missing rows (a gap
in the stream, :meth:`ActivityDetector.skip`) are not measured: the interval
they fall in is abandoned, the next one starts after the gap, and time moves
on by the gap's length; a channel keeps its state across a gap. Memory does
not grow with the stream's length.
"""

from __future__ import annotations

from collections import deque
from dataclasses import dataclass

import numpy as np

from .errors import ParameterError

__all__ = ["ActivityDetector", "Event"]


@dataclass
class Event:
    time: float        # seconds from the stream's first row
    column: int
    level_db: float    # mean level over the intervals that decided the event (dBFS)
    kind: str          # "on" or "off"


def _db(power: np.ndarray) -> np.ndarray:
    return 10 * np.log10(np.maximum(power, 1e-30))


class ActivityDetector:
    def __init__(self, columns: int, rate: float, *, interval: float = 0.05, threshold: float = 10.0,
                 hysteresis: float = 4.0, min_duration: float = 0.1,
                 floor_history: int = 20) -> None:
        for name, value in (("interval", interval), ("threshold", threshold)):
            if not value > 0:
                raise ParameterError(f"Parameter {name}={value!r} is not > 0!", param=name)
        if not 0 <= hysteresis < threshold:
            raise ParameterError(f"Parameter {hysteresis=} is not >= 0 and < threshold={threshold}!",
                                 param="hysteresis")
        self.columns = int(columns)
        self.rate = float(rate)
        self.rows_per_interval = max(1, int(round(interval * rate)))
        self.interval = self.rows_per_interval / self.rate
        self.threshold = threshold
        self.hysteresis = hysteresis
        self.min_intervals = max(1, int(round(min_duration / self.interval)))
        self.floor_values: deque[float] = deque(maxlen=floor_history)
        self.own_history: list[deque[float]] = [deque(maxlen=200) for _ in range(self.columns)]
        self.partial = np.zeros(self.columns)
        self.partial_rows = 0
        self.intervals = 0
        self.on = np.zeros(self.columns, dtype=bool)
        self.run = np.zeros(self.columns, dtype=np.int64)        # consecutive intervals against the state
        self.run_power = np.zeros(self.columns)
        self.on_power = np.zeros(self.columns)                    # power summed over the current on period
        self.on_count = np.zeros(self.columns, dtype=np.int64)
        self.on_intervals = np.zeros(self.columns, dtype=np.int64)
        self.all_on_power = np.zeros(self.columns)                # power summed over every on period
        self.peak = np.full(self.columns, -np.inf)
        self.power_sum = np.zeros(self.columns)
        self.floor_db = np.nan
        self.run_start = np.zeros(self.columns)                   # time the current run of intervals began
        self.position = 0            # absolute index of the next row
        self.interval_start = 0      # absolute index of the first row of the interval being measured
        self.last_end = 0.0          # time at the end of the last measured interval
        self.gaps = 0
        self.missing = 0             # rows missing in gaps, not measured

    def process(self, rows: np.ndarray) -> list[Event]:
        """Take rows ``(n, C)`` (or ``(n,)`` for one channel); return the events they complete."""
        rows = np.asarray(rows)
        if rows.ndim == 1:
            rows = rows[:, None]
        power = np.abs(rows) ** 2
        events = []
        start = 0
        while start < len(power):
            if self.partial_rows == 0:
                self.interval_start = self.position + start
            take = min(self.rows_per_interval - self.partial_rows, len(power) - start)
            self.partial += power[start:start + take].sum(axis=0)
            self.partial_rows += take
            start += take
            if self.partial_rows == self.rows_per_interval:
                events.extend(self._interval(self.partial / self.rows_per_interval))
                self.partial[:] = 0
                self.partial_rows = 0
        self.position += len(power)
        return events

    def skip(self, rows: int) -> None:
        """``rows`` rows are missing here: abandon the interval in progress and move time on."""
        self.partial[:] = 0
        self.partial_rows = 0
        self.position += int(rows)
        self.gaps += 1
        self.missing += int(rows)

    def _floor(self, level: np.ndarray) -> np.ndarray:
        if self.columns >= 4:
            self.floor_values.append(float(np.median(level)))
            return np.full(self.columns, float(np.median(self.floor_values)))
        for c in range(self.columns):
            self.own_history[c].append(level[c])
        return np.array([np.percentile(self.own_history[c], 10) for c in range(self.columns)])

    def _interval(self, power: np.ndarray) -> list[Event]:
        level = _db(power)
        floor = self._floor(level)
        self.floor_db = float(np.median(floor))
        t0 = self.interval_start / self.rate
        self.last_end = t0 + self.interval
        self.intervals += 1
        self.peak = np.maximum(self.peak, level)
        self.power_sum += power
        above = level >= floor + self.threshold
        below = level < floor + self.threshold - self.hysteresis
        events = []
        for c in range(self.columns):
            if self.on[c]:
                self.on_power[c] += power[c]
                self.all_on_power[c] += power[c]
                self.on_count[c] += 1
                self.on_intervals[c] += 1
            if below[c] if self.on[c] else above[c]:
                if self.run[c] == 0:
                    self.run_power[c] = 0.0
                    self.run_start[c] = t0
                self.run[c] += 1
                self.run_power[c] += power[c]
            else:
                self.run[c] = 0
            if self.run[c] >= self.min_intervals:
                start = float(self.run_start[c])
                if self.on[c]:
                    # the trailing quiet intervals were not part of the transmission
                    self.on_power[c] -= self.run_power[c]
                    self.all_on_power[c] -= self.run_power[c]
                    self.on_count[c] -= self.run[c]
                    self.on_intervals[c] -= self.run[c]
                    events.append(Event(start, c, float(_db(self.on_power[c] / max(self.on_count[c], 1))), "off"))
                else:
                    events.append(Event(start, c, float(_db(self.run_power[c] / self.run[c])), "on"))
                    self.on_power[c] = self.run_power[c]
                    self.all_on_power[c] += self.run_power[c]
                    self.on_count[c] = self.run[c]
                    self.on_intervals[c] += self.run[c]
                self.on[c] = not self.on[c]
                self.run[c] = 0
        return events

    def finish(self) -> list[Event]:
        """Close channels still on at the end with an "off" event dated at the end of the last interval."""
        end = self.last_end
        events = [Event(end, c, float(_db(self.on_power[c] / max(self.on_count[c], 1))), "off")
                  for c in range(self.columns) if self.on[c]]
        self.on[:] = False
        return events

    def summary(self) -> list[dict[str, float]]:
        """Per column: duty cycle (0..1), peak and mean level over the stream, and the mean level
        while on (dBFS; NaN for a channel never on)."""
        n = max(self.intervals, 1)
        return [{"duty_cycle": float(self.on_intervals[c] / n), "peak_db": float(self.peak[c]),
                 "mean_db": float(_db(self.power_sum[c] / n)),
                 "on_level_db": float(_db(self.all_on_power[c] / self.on_intervals[c]))
                 if self.on_intervals[c] else float("nan")} for c in range(self.columns)]
