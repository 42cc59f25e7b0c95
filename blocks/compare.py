"""The comparison sink: how well does one stream reproduce another (round-trip checks)."""

from __future__ import annotations

import json
from typing import Any

import numpy as np

from .block import Block, BlockContext, BlockError, Chunk, Output, Param, Port, StreamInfo
from .output_files import replace_file

__all__ = ["Compare"]
from .dsp.verification import estimate_delay
from .units import format_frequency


class Compare(Block):
    type_name = "compare"
    summary = "Compare a stream with a reference: delay, gain, phase and error in dB, with PASS/FAIL."
    parameters = (
        Param("delay", "int", "samples the test stream lags the reference; -1 = the synthesis design's "
              "delay if known, else found by cross-correlation", default=-1, minimum=-1, maximum=1 << 31),
        Param("max_delay", "int", "largest delay the cross-correlation looks for", default=65536, minimum=1, maximum=1 << 24),
        Param("settle", "int", "samples after the start not counted (-1 = as many as the delay)", default=-1,
              minimum=-1, maximum=1 << 31),
        Param("threshold", "quantity", "PASS when the error is at or below this", default=-100.0, unit="dB"),
        Param("path", "output-path", "also write the figures as JSON here ('' = do not)", default=""),
    )
    inputs = (Port("reference", "samples", "the original stream"),
              Port("test", "samples", "the stream that should reproduce it"))

    def output_streams(self, inputs: dict[str, StreamInfo]) -> dict[str, StreamInfo]:
        a, b = inputs["reference"], inputs["test"]
        if abs(a.sample_rate - b.sample_rate) > 1e-9 * a.sample_rate:
            raise BlockError(f"sample-rate mismatch: reference at {format_frequency(a.sample_rate)}, test at "
                             f"{format_frequency(b.sample_rate)}", port="test")
        return {}

    def __init__(self, params: dict[str, Any], context: BlockContext) -> None:
        super().__init__(params, context)
        self.ended = False
        self.started = False

    def start(self, inputs: dict[str, StreamInfo]) -> None:
        self.started = True
        hint = inputs["test"].design.get("round_trip_delay") if inputs["test"].design else None
        self.delay = self.params["delay"] if self.params["delay"] >= 0 else hint
        self.estimated = self.delay is None
        self.buffers: dict[str, list[np.ndarray]] = {"reference": [], "test": []}
        self.base = {"reference": 0, "test": 0}      # absolute index of each buffer's first sample
        self.held = {"reference": 0, "test": 0}
        self.missing = {"reference": 0, "test": 0}      # zero-filled samples, by input
        self.ended = False
        self.err = self.ref = 0.0
        self.cross = 0j
        self.test_power = 0.0
        self.count = 0

    def _array(self, port: str) -> np.ndarray:
        parts = self.buffers[port]
        if len(parts) > 1:
            self.buffers[port] = [np.concatenate(parts)]
        return self.buffers[port][0] if self.buffers[port] else np.zeros(0, np.complex64)

    def _drop(self, port: str, n: int) -> None:
        data = self._array(port)[n:]
        self.buffers[port] = [data] if len(data) else []
        self.base[port] += n
        self.held[port] -= n

    def consume(self, port: str, chunk: Chunk) -> Output:
        data = chunk.with_gap_filled().astype(np.complex128)     # missing samples count as error
        self.missing[port] += chunk.dropped
        self.buffers[port].append(data)
        self.held[port] += len(data)
        self._advance()
        return {}

    def _advance(self) -> None:
        if self.delay is None:
            need = self.params["max_delay"] + 65536
            if (self.held["reference"] < need or self.held["test"] < need) and not self.ended:
                return
            ref, test = self._array("reference"), self._array("test")
            n = min(len(ref), 65536, max(len(test) - 1, 1))
            self.delay = estimate_delay(ref[:n], test[:n + self.params["max_delay"]], self.params["max_delay"])
        d = self.delay
        settle = d if self.params["settle"] < 0 else self.params["settle"]
        ref, test = self._array("reference"), self._array("test")
        # pair reference m with test m + d
        start = max(self.base["reference"], self.base["test"] - d)
        stop = min(self.base["reference"] + len(ref), self.base["test"] + len(test) - d)
        if stop <= start:
            return
        r = ref[start - self.base["reference"]:stop - self.base["reference"]]
        t = test[start + d - self.base["test"]:stop + d - self.base["test"]]
        keep = slice(max(0, settle - start), None)
        r, t = r[keep], t[keep]
        self.err += float(np.sum(np.abs(t - r) ** 2))
        self.ref += float(np.sum(np.abs(r) ** 2))
        self.test_power += float(np.sum(np.abs(t) ** 2))
        self.cross += complex(np.sum(t * np.conj(r)))
        self.count += len(r)
        self._drop("reference", stop - self.base["reference"])
        self._drop("test", max(0, stop + d - self.base["test"]))

    def finish(self) -> Output:
        self.ended = True
        self._advance()
        return {}

    def figures(self) -> dict[str, Any]:
        if not self.count or self.ref == 0 or self.delay is None:
            return {"delay_samples": self.delay, "compared_samples": self.count, "error_db": None, "pass": False,
                    "missing_samples": dict(self.missing)}
        error_db = 10 * np.log10(max(self.err / self.ref, 1e-30))
        gain = abs(self.cross) / self.ref
        residual = max(self.test_power - abs(self.cross) ** 2 / self.ref, 0.0)     # error after best gain/phase
        return {"delay_samples": int(self.delay), "delay_found_by": "cross-correlation" if self.estimated else "design",
                "compared_samples": int(self.count), "error_db": round(float(error_db), 2),
                "error_after_gain_and_phase_db": round(float(10 * np.log10(max(residual / self.ref, 1e-30))), 2),
                "gain_db": round(float(20 * np.log10(max(gain, 1e-30))), 6),
                "phase_degrees": round(float(np.degrees(np.angle(self.cross))), 6),
                "threshold_db": self.params["threshold"], "pass": bool(error_db <= self.params["threshold"]),
                "missing_samples": dict(self.missing)}

    def close(self) -> None:
        if self.ended and self.params["path"]:
            path = self.context.output_path(self.params["path"])
            path.parent.mkdir(parents=True, exist_ok=True)
            replace_file(path, json.dumps(self.figures(), indent=2) + "\n")

    def report(self) -> list[str]:
        if not self.started:
            return []
        f = self.figures()
        if f["error_db"] is None:
            return [f"FAIL: nothing to compare (delay {f['delay_samples']}, {f['compared_samples']} samples)"]
        verdict = "PASS" if f["pass"] else "FAIL"
        return [f"{verdict}: error {f['error_db']:.1f} dB (threshold {f['threshold_db']:g} dB) over "
                f"{f['compared_samples']} samples; delay {f['delay_samples']} samples ({f['delay_found_by']}); "
                f"gain {f['gain_db']:+.4f} dB, phase {f['phase_degrees']:+.4f} degrees"] + \
            [f"{count} samples missing on '{port}', compared as zeros" for port, count in self.missing.items() if count]
