"""The consuming side of an endpoint against bandloom's own serving side, in one process over real tcp: credit,
acknowledgements, a reconnect that loses and repeats nothing (docs/wire.md, "Endpoints")."""

import socket
import time

import numpy as np
import zmq
from bandloom.blocks.block import Chunk, StreamInfo
from bandloom.runtime.endpoint_client import EndpointInlet
from bandloom.runtime.endpoints import EndpointOutlet
from bandloom.runtime.worker_spec import LinkSpec

STREAM = StreamInfo("samples", "cf32", 48000.0, 156e6)


def free_port():
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def test_a_consumer_that_reconnects_asks_again_and_gets_every_row_once(rng):
    """Three chunks are taken, the third not yet acknowledged, two more are waiting; the connection is dropped
    and made again. The consumer asks for credit anew, acknowledging the chunk it holds (the endpoint would
    otherwise send it again), the endpoint sends the rest, and every row arrives once, in order.

    A message may still reach the consumer twice: one the old connection had already carried when the
    endpoint, seeing it close, queued it to be sent again (seen beside two CPU-bound processes, 1 run in 12).
    The consumer knows it by its index and skips it (docs/wire.md), so what the block gets is checked row for
    row, and every skipped duplicate must be one the endpoint counts as sent again."""
    endpoint = f"tcp://127.0.0.1:{free_port()}"
    context = zmq.Context()
    outlet = EndpointOutlet(context, LinkSpec(link=1, label="a.out -> b.in", endpoint=endpoint, stream=STREAM,
                                              bind=True, queue=8), lambda: False)
    inlet = EndpointInlet(context, LinkSpec(link=1, label="a.out -> b.in", endpoint=endpoint, stream=STREAM,
                                            bind=False, queue=8), "in")
    data = (rng.standard_normal(500) + 1j * rng.standard_normal(500)).astype(np.complex64)
    got: list[np.ndarray] = []

    def take(count, *, acknowledge=True):
        deadline = time.monotonic() + 10
        while count and time.monotonic() < deadline:
            outlet._service(5)
            outlet._pump()
            chunk = inlet.receive()
            if chunk is not None and chunk.count:
                got.append(chunk.data.copy())
                count -= 1
                if acknowledge or count:
                    inlet.processed()
        assert count == 0, "the endpoint stopped sending"

    try:
        for i in range(5):
            outlet.send(Chunk(data[100 * i:100 * i + 100], 100 * i))
        take(3, acknowledge=False)
        inlet.client.sock.disconnect(endpoint)
        inlet.client.sock.connect(endpoint)
        take(2)
        assert np.array_equal(np.concatenate(got), data)
        deadline = time.monotonic() + 10
        while outlet.stats().delivered_rows < 500 and time.monotonic() < deadline:
            outlet._service(5)                      # the last acknowledgement
        assert inlet.client.reconnects == 1
        assert inlet.client.duplicates <= outlet.stats().resent_messages
        assert outlet.stats().delivered_rows == 500 and outlet.stats().consumers == 1
        assert inlet.stats().rows == 500 and inlet.stats().missing == 0
    finally:
        inlet.close()
        outlet.close()
        context.term()
