"""The discard sink: takes any stream, keeps nothing, counts what it saw."""

from __future__ import annotations

import time

from .block import Block, Param, Port


class Discard(Block):
    type_name = "discard"
    summary = "Take any stream and throw it away, counting samples and gaps."
    parameters = (Param("rate_limit", "quantity", "take at most this many samples per second, to rehearse a "
                        "slow consumer (0 = as fast as they come)", default=0.0, unit="Hz", minimum=0.0),)
    inputs = (Port("samples", "any", "any stream", sample_types=("cf32", "f32")),)

    def start(self, inputs):
        self.rows = 0
        self.gaps = 0
        self.missing = 0
        self.started = time.monotonic()

    def consume(self, port, chunk):
        self.rows += chunk.count
        if chunk.dropped:
            self.gaps += 1
            self.missing += chunk.dropped
        if self.params["rate_limit"]:
            delay = self.started + self.rows / self.params["rate_limit"] - time.monotonic()
            if delay > 0:
                time.sleep(delay)
        return {}

    def report(self):
        return [f"discarded {getattr(self, 'rows', 0)} samples; {getattr(self, 'gaps', 0)} gaps, "
                f"{getattr(self, 'missing', 0)} samples missing"]
