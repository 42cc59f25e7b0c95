"""The run's counters for a metrics scraper, in the Prometheus text exposition format.

``bandloom run --metrics [HOST:]PORT`` serves ``http://HOST:PORT/metrics``
(HOST defaults to 127.0.0.1, loopback only) while the run lasts, with the
``prometheus_client`` library. Every scrape reads the supervisor's latest
statistics from the workers (sent twice a second), so values are at most
about half a second old, and two blocks' figures are read at different
moments: a link's in-flight gauge is ``max(0, sent - received)`` of what its
two ends last said (exact once both have ended, as in the run's summary). Names follow the exposition format's conventions:
counters end in ``_total``, samples are counted in samples, ratios are 0..1.

Per link (label ``link``, the link's label as the summary prints it):
``bandloom_link_sent_samples_total``, ``bandloom_link_received_samples_total``
(for an endpoint: acknowledged by its consumers), ``bandloom_link_dropped_samples_total``,
``bandloom_link_missing_samples_total`` (gaps that arrived on the link),
``bandloom_link_sent_messages_total``, ``bandloom_link_shared_memory_messages_total`` (of those,
the messages whose samples went through shared memory, see :mod:`.shared_rings`),
``bandloom_link_in_flight_samples``, ``bandloom_link_held_samples`` (waiting in the
sender to fill a message, see the link's ``latency``) and ``bandloom_link_queue_fill_ratio``.
Per block (label ``block``): ``bandloom_block_state`` (one series per state,
1 for the current one), ``bandloom_block_samples_in_total``,
``bandloom_block_samples_out_total``, ``bandloom_block_lost_samples_total``
and ``bandloom_block_restarts_total``. For the run: ``bandloom_run_seconds``.
"""

from __future__ import annotations

import ipaddress
import time
from collections.abc import Iterator
from typing import TYPE_CHECKING

from prometheus_client.core import CounterMetricFamily, GaugeMetricFamily, Metric, StateSetMetricFamily
from prometheus_client.exposition import start_http_server
from prometheus_client.registry import Collector, CollectorRegistry

from .control import BlockState
from .run_report import link_counts, queue_fill, received_and_in_flight

if TYPE_CHECKING:
    from wsgiref.simple_server import WSGIServer

    from .supervisor import Supervisor

__all__ = ["FlowCollector", "MetricsAddressError", "MetricsServer", "is_loopback", "parse_metrics_address"]


class MetricsAddressError(ValueError):
    """``--metrics`` is not [HOST:]PORT, or the address cannot be served; the message says why."""


def parse_metrics_address(text: str) -> tuple[str, int]:
    """``"9464"`` -> ("127.0.0.1", 9464); ``"0.0.0.0:9464"`` and ``"[::1]:9464"`` as written."""
    host, _, port_text = text.rpartition(":")
    host = host.strip("[]") or "127.0.0.1"
    try:
        port = int(port_text)
        ipaddress.ip_address(host)
    except ValueError:
        raise MetricsAddressError(f"--metrics {text!r}: expected [HOST:]PORT with a numeric address, for example "
                                  f"9464 or 127.0.0.1:9464") from None
    if not 0 <= port <= 65535:
        raise MetricsAddressError(f"--metrics {text!r}: the port must be 0..65535")
    return host, port


def is_loopback(host: str) -> bool:
    return ipaddress.ip_address(host).is_loopback


class FlowCollector(Collector):
    """Reads a running supervisor's statistics at each scrape (see module doc)."""

    def __init__(self, supervisor: Supervisor) -> None:
        self.supervisor = supervisor
        self.started = time.monotonic()

    def collect(self) -> Iterator[Metric]:
        supervisor = self.supervisor
        blocks = dict(supervisor.blocks)
        link = {name: (CounterMetricFamily(f"bandloom_link_{name}", doc, labels=["link"]))
                for name, doc in (("sent_samples", "Samples sent on the link"),
                                  ("received_samples", "Samples received from the link (endpoints: acknowledged)"),
                                  ("dropped_samples", "Samples the link dropped while full"),
                                  ("missing_samples", "Samples missing in gaps on the link"),
                                  ("sent_messages", "Messages sent on the link"),
                                  ("shared_memory_messages", "Of the messages sent, those whose samples went "
                                                             "through shared memory"))}
        in_flight = GaugeMetricFamily("bandloom_link_in_flight_samples", "Samples sent and not yet received",
                                      labels=["link"])
        held = GaugeMetricFamily("bandloom_link_held_samples", "Samples waiting in the sender to fill a message",
                                 labels=["link"])
        fill = GaugeMetricFamily("bandloom_link_queue_fill_ratio", "Messages queued over the link's capacity",
                                 labels=["link"])
        for spec, sent, received in link_counts(supervisor.flow, blocks):
            label = [spec.label]
            link["sent_samples"].add_metric(label, sent.rows)
            link["dropped_samples"].add_metric(label, sent.dropped_rows)
            link["missing_samples"].add_metric(label, sent.missing_rows)
            link["sent_messages"].add_metric(label, sent.messages)
            link["shared_memory_messages"].add_metric(label, sent.shared_messages)
            held.add_metric(label, sent.held_rows)
            far, between = received_and_in_flight(sent, received)
            if far is not None and between is not None:
                link["received_samples"].add_metric(label, far)
                in_flight.add_metric(label, between)
            queued = queue_fill(spec, sent, received)
            if queued is not None:
                fill.add_metric(label, queued)
        yield from link.values()
        yield in_flight
        yield held
        yield fill
        state = StateSetMetricFamily("bandloom_block_state", "The block's state", labels=["block"])
        samples_in = CounterMetricFamily("bandloom_block_samples_in", "Samples the block took", labels=["block"])
        samples_out = CounterMetricFamily("bandloom_block_samples_out", "Samples the block gave", labels=["block"])
        lost = CounterMetricFamily("bandloom_block_lost_samples", "Samples the block lost itself", labels=["block"])
        restarts = CounterMetricFamily("bandloom_block_restarts", "Times the block was restarted", labels=["block"])
        for name, record in blocks.items():
            state.add_metric([name], {s.value: record.state is s for s in BlockState})
            last = record.totals
            samples_in.add_metric([name], last.rows_in if last else 0)
            samples_out.add_metric([name], last.rows_out if last else 0)
            lost.add_metric([name], sum(x.samples for x in last.losses) if last else 0)
            restarts.add_metric([name], record.restarts)
        yield from (state, samples_in, samples_out, lost, restarts)
        seconds = GaugeMetricFamily("bandloom_run_seconds", "Seconds since the run started")
        seconds.add_metric([], time.monotonic() - self.started)
        yield seconds


class MetricsServer:
    """The HTTP endpoint for one run: ``with MetricsServer(supervisor, host, port) as server: ...``."""

    def __init__(self, supervisor: Supervisor, host: str, port: int) -> None:
        registry = CollectorRegistry(auto_describe=False)
        registry.register(FlowCollector(supervisor))
        try:
            self.server: WSGIServer
            self.server, self.thread = start_http_server(port, addr=host, registry=registry)
        except OSError as error:
            raise MetricsAddressError(f"--metrics {host}:{port}: cannot serve there: {error.strerror}") from None
        self.host, self.port = host, self.server.server_port

    @property
    def url(self) -> str:
        host = f"[{self.host}]" if ":" in self.host else self.host
        return f"http://{host}:{self.port}/metrics"

    def __enter__(self) -> MetricsServer:
        return self

    def __exit__(self, *exc_info: object) -> None:
        self.server.shutdown()
        self.server.server_close()
