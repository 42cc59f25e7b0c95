"""What a run did, for people and programs: the live status table, the summary, the verdict, the --report JSON.

Counts come from the workers' last statistics (:class:`~.control.StatsMessage`):
for each link what its sender delivered, dropped and counted as missing, and
what its receiver read; for each block its state, exit, report lines and the
samples it lost itself. For every internal link

    sent = received + in flight          (dropped samples were never sent)

so a run that stops early shows what was still in flight as lost, not as
nothing. The verdict adds up every place samples were lost: links that
dropped (``when_full = "drop"``), blocks that lost samples themselves (a live
source, a datagram the kernel dropped), and samples in flight when a run was
aborted. Missing samples further down a flow are the same samples again and
are not counted twice.
"""

from __future__ import annotations

import signal
from collections.abc import Collection, Mapping
from typing import TYPE_CHECKING, Any, TextIO

from bandloom.blocks.text_tables import engineering, render_rows

from .control import InletStats, OutletStats
from .flow import Flow, Link, WhenFull

if TYPE_CHECKING:
    from .supervisor import BlockRecord

__all__ = ["StatusDisplay", "describe_exit", "link_counts", "print_summary", "queue_fill", "received_and_in_flight",
           "summarise", "verdict"]


def describe_exit(code: int | None) -> str:
    """``exit status 1``, ``killed by SIGKILL``, or ``still running``."""
    if code is None:
        return "still running"
    if code < 0:
        try:
            return f"killed by {signal.Signals(-code).name}"
        except ValueError:
            return f"killed by signal {-code}"
    return f"exit status {code}"


def link_counts(flow: Flow, blocks: Mapping[str, BlockRecord]) -> list[tuple[Link, OutletStats, InletStats | None]]:
    """Each link with its sender's and (for internal links) its receiver's last counters."""
    rows = []
    for link in flow.links:
        source = blocks.get(link.source)
        sending = source.totals if source else None
        sent = sending.outputs.get(link.id) if sending else None
        received = None
        if link.target:
            target = blocks.get(link.target)
            receiving = target.totals if target else None
            received = (receiving.inputs.get(link.id) if receiving else None) or InletStats()
        rows.append((link, sent or OutletStats(), received))
    return rows


def summarise(flow: Flow, blocks: Mapping[str, BlockRecord], *, outcome: str, seconds: float,
              accept_loss: bool = False, local: Collection[str] | None = None,
              gone_hosts: Collection[str] = ()) -> dict[str, Any]:
    """The end-of-run report as plain values (what --report writes as JSON), verdict included.

    For one host's share of a flow, ``local`` names its blocks: the report shows them and the links that
    touch them (``blocks`` holds the other hosts' blocks too, as their shares last told them), and counts
    the losses of the links that leave its blocks; the share a link comes from counts its losses, unless
    that host is gone (``gone_hosts``): then what it last said it sent and this share did not receive is
    counted here."""
    links = []
    losses: list[dict[str, Any]] = []
    for link, sent, received in link_counts(flow, blocks):
        if local is not None and link.source not in local and link.target not in local:
            continue
        crossing = flow.crosses(link) if local is not None else False
        endpoint = sent.delivered_rows is not None
        _, in_flight = received_and_in_flight(sent, received)
        links.append({
            "link": link.label, "where": link.declared_at,
            "sent_samples": sent.rows, "sent_messages": sent.messages,
            "received_samples": received.rows if received else None,
            "received_messages": received.messages if received else None,
            "in_flight_samples": in_flight,
            "lost_at_restart_samples": received.lost_at_restart if received else 0,
            "dropped_samples": sent.dropped_rows, "dropped_while_down_samples": sent.down_rows,
            "dropped_messages": sent.dropped_messages,
            "discontinuities": sent.discontinuities, "missing_samples": sent.missing_rows,
            "last_index": sent.next_index, "held_samples": sent.held_rows, "copied_bytes": sent.copied_bytes,
            "shared_memory_messages": sent.shared_messages,
        })
        if endpoint:
            links[-1].update(delivered_samples=sent.delivered_rows, consumers=sent.consumers,
                             resent_messages=sent.resent_messages, refused_consumers=sent.refused)
        if crossing:
            hosts = flow.instances[link.source].host, flow.instances[link.target or ""].host
            links[-1]["crosses"] = f"to host {hosts[1]}" if link.source in (local or ()) else f"from host {hosts[0]}"
            links[-1]["received_samples"] = received.rows if received else None
            if link.source not in (local or ()) and hosts[0] not in gone_hosts:
                continue                 # its losses are counted by the host it comes from
        consumer = blocks.get(link.target) if link.target else None
        if sent.dropped_rows - sent.down_rows:
            declared = link.options.when_full is WhenFull.DROP
            losses.append({"samples": sent.dropped_rows - sent.down_rows, "where": f"link {link.label}",
                           "why": "dropped while the link was full" + (' (when_full = "drop")' if declared else ""),
                           "accepted": declared})
        if sent.down_rows:
            policy = consumer.policy.on_failure.value if consumer else "?"
            losses.append({"samples": sent.down_rows, "where": f"link {link.label}",
                           "why": f"dropped while {link.target} was down (on_failure = \"{policy}\")", "accepted": False})
        if received is not None and received.lost_at_restart:
            losses.append({"samples": received.lost_at_restart, "where": f"link {link.label}",
                           "why": f"sent to {link.target} before it failed, read by no instance (restarted)",
                           "accepted": False})
        when = f"when the run {'was ' if outcome == 'interrupted' else ''}{outcome}"
        if sent.held_rows:
            losses.append({"samples": sent.held_rows, "where": f"link {link.label}",
                           "why": f"waiting in {link.source}'s batch for the link (latency) {when}",
                           "accepted": False})
        if in_flight:
            why = f"not acknowledged by a consumer of the endpoint {when}" if endpoint else f"still in flight {when}"
            if crossing:
                why = f"sent to {link.target} on another host, not acknowledged by it {when}"
                if link.source not in (local or ()):
                    why = f"sent by {link.source} on host {hosts[0]}, which was lost, and not received here"
            if consumer is not None and consumer.left_down:
                why = f"sent to {link.target} before it failed, read by nobody (on_failure = \"continue\")"
            losses.append({"samples": in_flight, "where": f"link {link.label}", "why": why, "accepted": False})
    if local is not None:
        blocks = {name: record for name, record in blocks.items() if name in local}
    for name, record in blocks.items():
        totals = record.totals
        for loss in (totals.losses if totals else []):
            losses.append({"samples": loss.samples, "where": f"block {name}", "why": loss.reason,
                           "accepted": loss.accepted})
    report = {}
    for name, r in blocks.items():
        totals = r.totals
        report[name] = {"pid": r.pid, "state": r.state.value, "exit": r.exit_description,
                        "reason": r.exit_reason, "report": list(r.report), "restarts": r.restarts,
                        "incidents": list(r.incidents),
                        "samples_in": totals.rows_in if totals else 0, "samples_out": totals.rows_out if totals else 0,
                        # for 'bandloom bench --flow' (CLOCK_MONOTONIC seconds, one clock for the whole machine)
                        "started_clock": totals.started_clock if totals else None,
                        "busy_seconds": totals.busy_seconds if totals else 0.0,
                        "cpu_seconds": totals.cpu_seconds if totals else 0.0,
                        "first_samples_clock": totals.first_rows_clock if totals else None,
                        "last_report_clock": totals.started_clock + totals.time if totals else None}
    lost = sum(x["samples"] for x in losses)
    unaccepted = sum(x["samples"] for x in losses if not x["accepted"])
    return {"flow": str(flow.path), "name": flow.name, "outcome": outcome, "seconds": round(seconds, 3),
            "blocks": report, "links": links, "losses": losses, "lost_samples": lost,
            "lost_samples_not_accepted": 0 if accept_loss else unaccepted, "loss_accepted_by_flow": accept_loss}


def verdict(summary: Mapping[str, Any]) -> str:
    """One line: that no sample was lost, or how many were lost, where and why."""
    if not summary["lost_samples"]:
        return "verdict: no sample lost"
    parts = [f"{x['samples']} {x['where']}: {x['why']}{' (allowed by the flow)' if x['accepted'] else ''}"
             for x in summary["losses"]]
    tail = ""
    if not summary["lost_samples_not_accepted"]:
        tail = " — accepted (accept_loss)" if summary["loss_accepted_by_flow"] else " — all of it allowed by the flow"
    return f"verdict: {summary['lost_samples']} samples lost: {'; '.join(parts)}{tail}"


def print_summary(summary: Mapping[str, Any], failures: list[str], log: TextIO, *, quiet: bool = False) -> None:
    """The summary on stderr: outcome, failures, the link table, each block's report lines, and last the
    verdict. ``quiet`` leaves only the failures and the verdict."""
    if not quiet:
        print(f"bandloom: flow {summary['name']!r} {summary['outcome']} in {summary['seconds']:.2f} s", file=log)
    for line in failures:
        print(f"bandloom: {line}", file=log)
    if not quiet:
        show_flight = summary["outcome"] != "finished" or any(x["in_flight_samples"] for x in summary["links"])
        headers = ["link", "samples", "messages", "dropped", "missing", "gaps"] + (["in flight"] if show_flight else [])
        rows = [[_link_name(x), x["sent_samples"], x["sent_messages"], x["dropped_samples"], x["missing_samples"],
                 x["discontinuities"]] + (["-" if x["in_flight_samples"] is None else x["in_flight_samples"]]
                                          if show_flight else []) for x in summary["links"]]
        print("\n".join("  " + line for line in render_rows(headers, rows).splitlines()), file=log)
        print("  (dropped: lost on this link when full; missing: lost before it, counted and flagged"
              + ("; in flight: sent, not yet received when the run stopped" if show_flight else "") + ")", file=log)
        for x in summary["links"]:
            if "delivered_samples" in x:
                notes = [f"{x['resent_messages']} message{'s' if x['resent_messages'] != 1 else ''} sent again after a "
                         f"consumer left"] if x["resent_messages"] \
                    else []
                notes += [f"{x['refused_consumers']} consumers refused (one at a time)"] if x["refused_consumers"] else []
                print(f"  {x['link']}: {x['delivered_samples']} samples acknowledged by {x['consumers']} consumer"
                      f"{'s' if x['consumers'] != 1 else ''}" + "".join(f"; {n}" for n in notes), file=log)
        for name, block in summary["blocks"].items():
            for line in block["report"]:
                print(f"  {name}: {line}", file=log)
        for host, other in summary.get("other_hosts", {}).items():
            lost = other["lost_samples"]
            if other["lost"]:
                text = other["lost"]
                print(f"  {text}" if text.startswith(f"host {host} ") else f"  host {host}: {text}", file=log)
                continue
            how = f"{other['outcome'] or other['state']}, " + (
                f"{lost} samples lost (see its summary)" if lost else "no sample lost")
            print(f"  host {host}: {how}", file=log)
    print(f"bandloom: {verdict(summary)}", file=log)


def _link_name(row: Mapping[str, Any]) -> str:
    """A link as the summary table shows it: its label, and the host it goes to or comes from."""
    return row["link"] + (f" ({row['crosses']})" if "crosses" in row else "")


def received_and_in_flight(sent: OutletStats, received: InletStats | None) -> tuple[int | None, int | None]:
    """What reached the far end of a link (for an endpoint: what its consumers acknowledged) and what is
    still between the ends (sent - received - lost at a restart of the receiver, never below 0: the two
    ends report at different moments); None for both when nothing is known of the far end. Rows the
    sender holds in a batch are not sent yet: they are its ``held_rows``."""
    if sent.delivered_rows is not None:
        # a link to a block on another host: what it acknowledged, or what it said it received if that is
        # more (its acknowledgement of the last chunk may not have reached the sender when both stopped)
        reached = max(sent.delivered_rows, received.rows if received else 0)
        return reached, max(0, sent.rows - reached)
    if received is None:
        return None, None
    return received.rows, max(0, sent.rows - received.rows - received.lost_at_restart)


def queue_fill(link: Link, sent: OutletStats, received: InletStats | None) -> float | None:
    """Messages between a link's two ends over what its queues hold (0..1); None for an endpoint."""
    if received is None:
        return None
    return min(1.0, max(0, sent.seq - (received.seq + 1)) / (2 * link.options.queue))


class StatusDisplay:
    """A per-block status table redrawn in place on a terminal."""

    def __init__(self, log: TextIO) -> None:
        self.log = log
        self.lines = 0

    def show(self, flow: Flow, blocks: Mapping[str, BlockRecord]) -> None:
        fills: dict[str, float] = {}
        for link, sent, received in link_counts(flow, blocks):
            fill = queue_fill(link, sent, received)
            if link.target and fill is not None:
                fills[link.target] = max(fills.get(link.target, 0.0), fill)
        rows = []
        for name, record in blocks.items():
            last = record.totals
            drops = sum(o.dropped_rows for o in last.outputs.values()) if last else 0
            done = max(last.rows_in, last.rows_out) if last else 0
            bar = ""
            if last and last.progress and last.progress[1]:
                part = min(1.0, last.progress[0] / last.progress[1])
                bar = f"[{'#' * int(20 * part):<20}] {100 * part:3.0f}%"
            queue = f"{100 * fills[name]:.0f}%" if name in fills else "-"
            rows.append([name[:24], record.state.value, engineering(record.rate, "sps"), done, queue, drops, bar])
        table = render_rows(["block", "state", "rate", "samples", "queue", "drops", "progress"], rows)
        self.clear()
        self.log.write(table + "\n")
        self.log.flush()
        self.lines = table.count("\n") + 1

    def clear(self) -> None:
        if self.lines:
            self.log.write(f"\x1b[{self.lines}F\x1b[J")
            self.log.flush()
            self.lines = 0
