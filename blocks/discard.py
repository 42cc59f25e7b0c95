"""The discard sink: takes any stream, keeps nothing, counts what it saw."""

from __future__ import annotations

from typing import Any

from .block import Block, BlockContext, Chunk, Output, Pacer, Param, Port, StreamInfo

__all__ = ["Discard"]


class Discard(Block):
    type_name = "discard"
    restartable = True                # carries gaps, so a new instance can take over mid-stream
    summary = "Take any stream and throw it away, counting samples and gaps."
    parameters = (Param("rate_limit", "quantity", "take at most this many samples per second, to rehearse a "
                        "slow consumer (0 = as fast as they come)", default=0.0, unit="Hz", minimum=0.0),)
    inputs = (Port("samples", "any", "any stream", sample_types=("cf32", "f32")),)

    def __init__(self, params: dict[str, Any], context: BlockContext) -> None:
        super().__init__(params, context)
        self.rows = 0
        self.gaps = 0
        self.missing = 0
        self.pacer: Pacer | None = None

    def start(self, inputs: dict[str, StreamInfo]) -> None:
        self.pacer = Pacer(self.params["rate_limit"]) if self.params["rate_limit"] else None

    def consume(self, port: str, chunk: Chunk) -> Output:
        self.rows += chunk.count
        if chunk.dropped:
            self.gaps += 1
            self.missing += chunk.dropped
        if self.pacer:
            self.pacer.wait_until(self.rows)
        return {}

    def report(self) -> list[str]:
        return [f"discarded {self.rows} samples; {self.gaps} gaps, {self.missing} samples missing"]
