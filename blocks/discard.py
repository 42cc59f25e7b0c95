"""The discard sink: takes any stream, keeps nothing, counts what it saw."""

from __future__ import annotations

from .block import Block, Port


class Discard(Block):
    type_name = "discard"
    summary = "Take any stream and throw it away, counting samples and gaps."
    inputs = (Port("samples", "any", "any stream", sample_types=("cf32", "f32")),)

    def start(self, inputs):
        self.rows = 0
        self.gaps = 0
        self.missing = 0

    def consume(self, port, chunk):
        self.rows += chunk.count
        if chunk.dropped:
            self.gaps += 1
            self.missing += chunk.dropped
        return {}

    def report(self):
        return [f"discarded {getattr(self, 'rows', 0)} samples; {getattr(self, 'gaps', 0)} gaps, "
                f"{getattr(self, 'missing', 0)} samples missing"]
