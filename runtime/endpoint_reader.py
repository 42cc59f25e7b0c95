"""The ``endpoint-reader`` source block: a stream taken from an endpoint, another flow's or any program's.

It lives in the runtime, not with the other blocks, because it speaks the
runtime's wire protocol (:mod:`.wire`, :mod:`.endpoint_client`); to a flow it
is a block like any other. It connects to the endpoint, asks for ``queue``
messages ahead, checks each one as a link's receiving end does, and
acknowledges each chunk once the flow has taken it, so the endpoint's run
counts as delivered exactly what this flow took.

Indices: the flow's stream starts at the first message this reader takes
(index 0 here), whose index in the sender's stream the report gives ("joined
at index N"): a reader that joins a long-running stream late does not fill
what came before it with zeros. Rows missing before that first message are
counted as missing in the run's verdict; every later gap, declared by the
sender (``dropped``) or not, is counted too and flagged downstream as a gap
in absolute time (writers zero-fill it). A gap larger than the silence before
it could hold is refused as a forged header (see
:class:`~.endpoint_client.EndpointClient`), so an outside sender cannot make
a writer fill a disk with zeros. After a reconnect, rows
already taken are skipped, never repeated.
"""

from __future__ import annotations

import math
import time
from pathlib import Path
from typing import Any

import zmq
from bandloom.blocks.block import Block, BlockContext, BlockError, Chunk, Loss, Output, Param, Port, StreamInfo

from . import wire
from .endpoint_client import EndpointClient, EndpointRefused
from .flow.declarations import endpoint_problem
from .keys import client_folder_problem

__all__ = ["EndpointReader"]

SAMPLE_TYPES = tuple(sorted(t for t in wire.SAMPLE_TYPES if t.startswith("c")))
POLL_MS = 100


class EndpointReader(Block):
    type_name = "endpoint-reader"
    summary = "Read one stream from an endpoint (docs/wire.md): another flow's output, or any program's."
    parameters = (
        Param("endpoint", "str", "where the stream is served: tcp://HOST:PORT or ipc://PATH",
              rule="'tcp://HOST:PORT' (for example 'tcp://10.0.0.1:5601') or 'ipc://PATH'"),
        Param("keys", "str", "folder holding client.key_secret and server.key, copied from the one 'bandloom keys' "
              "made for the endpoint (relative to the flow file)", default=None),
        Param("insecure", "bool", "connect to an endpoint on another machine without keys (in the clear)",
              default=False),
        Param("sample_type", "choice", "sample type the endpoint sends", default="cf32", choices=SAMPLE_TYPES),
        Param("sample_rate", "quantity", "sample rate the endpoint sends (checked against its messages)", unit="Hz",
              minimum=1e-9),
        Param("centre_frequency", "quantity", "RF frequency at 0 Hz (checked against its messages)", default=0.0,
              unit="Hz"),
        Param("queue", "int", "messages asked for ahead", default=8, minimum=2, maximum=1024),
        Param("wait", "quantity", "how long to wait for the first message before failing (0: for ever)", default=30.0,
              unit="s", minimum=0.0, maximum=86400.0),
        Param("silence", "quantity", "after the first message, how long the stream may be silent before the block "
              "fails, naming the endpoint (0: for ever)", default=0.0, unit="s", minimum=0.0, maximum=86400.0),
    )
    outputs = (Port("samples", "samples", "the stream, at the sender's absolute indices", sample_types=SAMPLE_TYPES),)
    is_source = True

    def __init__(self, params: dict[str, Any], context: BlockContext) -> None:
        super().__init__(params, context)
        endpoint = params["endpoint"]
        problem, loopback = endpoint_problem(endpoint)
        if problem:
            raise BlockError(problem, param="endpoint")
        self.keys: Path | None = context.input_path(params["keys"]) if params["keys"] else None
        if self.keys is not None:
            problem = client_folder_problem(self.keys)
            if problem:
                raise BlockError(problem, param="keys")
            if params["insecure"]:
                raise BlockError("give keys (encrypted) or insecure = true (in the clear), not both", param="insecure")
        elif not loopback and not params["insecure"]:
            raise BlockError(f"{endpoint} is on another machine: give keys = \"FOLDER\" (client.key_secret and "
                             f"server.key of the endpoint's 'bandloom keys' folder), or insecure = true",
                             param="endpoint")
        self.client: EndpointClient | None = None
        self.context_zmq: zmq.Context | None = None
        self.started_at = 0.0
        self.last_message = 0.0
        self.first = True
        self.origin = 0            # the sender's index of this flow's first sample
        self.final_index: int | None = None
        self.ended = False
        self.closed = False

    def output_streams(self, inputs: dict[str, StreamInfo]) -> dict[str, StreamInfo]:
        p = self.params
        return {"samples": StreamInfo(kind="samples", sample_type=p["sample_type"], sample_rate=p["sample_rate"],
                                      centre_frequency=p["centre_frequency"])}

    def begin(self) -> None:
        if self.params["insecure"]:
            self.warn(f"{self.params['endpoint']} is read in the clear, unauthenticated (insecure = true): anyone on "
                      f"the network can read the stream or feed this flow")
        self.context_zmq = zmq.Context()
        stream = self.output_streams({})["samples"]
        self.client = EndpointClient(self.context_zmq, self.params["endpoint"], label=f"block {self.context.name}",
                                     keys=self.keys, credit=self.params["queue"], expect=stream)
        self.started_at = self.last_message = time.monotonic()

    def produce(self) -> Output | None:
        client = self.client
        assert client is not None
        if self.ended or self.stopping:
            return None
        endpoint = self.params["endpoint"]
        try:
            got = client.receive(POLL_MS)
        except EndpointRefused as error:
            raise ValueError(str(error)) from None
        except wire.WireError as error:
            raise ValueError(f"{endpoint} sent a message that breaks docs/wire.md: {error}") from None
        if got is None:
            self._check_waiting(client)
            return {}
        now, gap = time.monotonic(), got.gap
        if self.first:
            self._check_stream(got.header)
            self.first = False
            self.origin = got.header["first_index"]      # this flow's index 0: nothing before it is zero-filled
            gap = 0
        self.last_message = now
        if got.end:
            self.ended = True
            self.final_index = got.header["first_index"] - self.origin
            return None
        assert got.data is not None
        chunk = Chunk(got.data, got.header["first_index"] - self.origin, dropped=gap,
                      discontinuity=bool(gap or got.header["flags"] & wire.FLAG_DISCONTINUITY))
        return {"samples": chunk}

    def _check_waiting(self, client: EndpointClient) -> None:
        endpoint, now = self.params["endpoint"], time.monotonic()
        if client.keys_refused:
            raise ValueError(f"{endpoint} refused our keys ({client.handshake_failures} CURVE handshakes failed): "
                             f"keys = must be a copy of the endpoint's 'bandloom keys' folder")
        wait, silence = self.params["wait"], self.params["silence"]
        if self.first and wait and now - self.started_at > wait:
            raise ValueError(f"no message from {endpoint} in {wait:g} s (wait); is the flow or program that serves "
                             f"it running, and does another consumer hold it?")
        if not self.first and silence and now - self.last_message > silence:
            raise ValueError(f"{endpoint} has been silent for {silence:g} s (silence) after {client.continuity.rows} "
                             f"samples, at index {client.continuity.next_index}")

    def _check_stream(self, header: dict) -> None:
        for key in ("sample_rate", "centre_frequency"):
            if not math.isclose(header[key], self.params[key], rel_tol=1e-9, abs_tol=1e-6):
                raise ValueError(f"{self.params['endpoint']} sends {key} {header[key]:g}; the block says "
                                 f"{self.params[key]:g}: set {key} = {header[key]:g}")
        if header["width"] != 1:
            raise ValueError(f"{self.params['endpoint']} sends {header['width']} channels side by side; an "
                             f"endpoint-reader takes one stream: serve one channel per endpoint (select = N)")

    def end_index(self, port: str) -> int | None:
        """Rows missing after the last message (counted by the end of stream) end the stream there."""
        return self.final_index

    def losses(self) -> list[Loss]:
        c = self.client.continuity if self.client else None
        if c is None or not c.missing:
            return []
        declared = c.missing - c.undeclared
        return [Loss(c.missing, f"missing in the stream from {self.params['endpoint']} before this flow took it "
                                f"({declared} declared dropped by the sender, {c.gaps} gaps)")]

    def report(self) -> list[str]:
        c = self.client.continuity if self.client else None
        if c is None:
            return []
        skipped = f"; {self.client.duplicates} messages sent again after a reconnect skipped" \
            if self.client and self.client.duplicates else ""
        joined = f", joined at index {self.origin}" if self.origin else ""
        return [f"took {c.rows} samples from {self.params['endpoint']}, indices up to {c.next_index}{joined}{skipped}"]

    def close(self) -> None:
        if self.client is not None and not self.closed:
            self.closed = True
            self.client.close(bye=not self.ended)       # its counts stay for report() and losses()
        if self.context_zmq is not None:
            self.context_zmq.term()
            self.context_zmq = None
