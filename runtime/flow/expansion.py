"""From declarations to processes: the wiring graph, each input's one producer, and expansion.

Expansion walks the declarations producers first. A plain block becomes one
:class:`~.model.Instance`; a per-channel block one instance per selected
channel (``name[channel]``), or one per copy of the per-channel block it
follows. Each instance is made once here, at check time, to work out its
output streams, so that a consumer's problems with its inputs are found
before anything runs.
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from bandloom.blocks.block import BlockContext, BlockError, Port, StreamInfo

from .declarations import TOLERANCE, Declaration, RawLink, parse_port_ref
from .graph import FlowCycle, producer_order
from .model import Instance, Link, LinkOptions
from .problems import KeyPath, ProblemLog, did_you_mean, format_key_path, known_names
from .selection import SelectionError, resolve_selection

__all__ = ["check_inputs", "expand", "wiring_order"]


def wiring_order(log: ProblemLog, decls: dict[str, Declaration], links: list[RawLink]) -> list[str] | None:
    """Declarations producers first, or None (with a problem) if the links form a cycle."""
    edges: dict[str, set[str]] = {name: set() for name in decls}
    for link in links:
        if link.target:
            edges[link.source].add(link.target)
    for name, decl in decls.items():
        if not decl.per_channel:
            continue
        at: KeyPath = ("blocks", name, "per_channel")
        ref = parse_port_ref(decl.per_channel.get("from"))
        if ref is None:
            log.add(at, f"'from' expects \"block.port\", got {decl.per_channel.get('from')!r}")
        elif ref[0] in decls:
            source = decls[ref[0]]
            if ref[1] not in [p.name for p in source.cls.outputs]:
                log.add(at, f"{source.cls.type_name} block {ref[0]!r} has no output port {ref[1]!r}; its "
                        f"outputs: {known_names(p.name for p in source.cls.outputs)}")
            else:
                edges[ref[0]].add(name)
        else:
            log.add(at, f"no block named {ref[0]!r}{did_you_mean(ref[0], decls)}")
    try:
        return producer_order(decls, edges)
    except FlowCycle as cycle:
        log.add(("links",), f"the links form a cycle through {', '.join(cycle.members)}; a flow must run "
                f"from sources to sinks without loops")
        return None


def check_inputs(log: ProblemLog, decls: dict[str, Declaration], links: list[RawLink],
                 claimed: set[tuple[str, str | None]]) -> None:
    """Every required input has exactly one producer (a link or the per-channel rule)."""
    for link in links:
        if link.target and link.target_port:
            decls[link.target].feeds.append((link.index, link.target_port))
    for name, decl in decls.items():
        if decl.per_channel:
            inputs = [p.name for p in decl.cls.inputs]
            port = decl.per_channel.get("input") or (inputs[0] if len(inputs) == 1 else None)
            if port is None or port not in inputs:
                log.add(("blocks", name, "per_channel"), f"say which input the channel feeds: "
                        f"input = one of {known_names(inputs)}")
                continue
            decl.feeds.append(("per_channel", port))
        origins_of: dict[str, list[int | str]] = {}
        for origin, port in decl.feeds:
            origins_of.setdefault(port, []).append(origin)
        for port, origins in origins_of.items():
            if len(origins) > 1:
                where = ", ".join(f"links[{o}]" if isinstance(o, int) else "per_channel" for o in origins)
                log.add(("blocks", name), f"input {port!r} has {len(origins)} producers ({where}); "
                        f"an input takes exactly one")
        for p in decl.cls.inputs:
            if p.required and p.name not in origins_of and (name, p.name) not in claimed \
                    and (name, None) not in claimed:
                log.add(("blocks", name), f"input {p.name!r} ({p.doc}) is not connected; add a "
                        f"[[links]] table with to = \"{name}.{p.name}\"")


@dataclass(frozen=True, kw_only=True)
class _Feed:
    """What one input of an instance-to-be is fed from, before the link is made."""

    source: str
    source_port: str
    columns: tuple[int, ...] | None
    stream: StreamInfo
    where: KeyPath
    options: LinkOptions = LinkOptions()


def accepts(log: ProblemLog, at: KeyPath, port: Port, stream: StreamInfo, describe: str) -> bool:
    """Problem unless ``stream`` can enter ``port``; ``describe`` names the input for messages."""
    if port.kind == "samples" and stream.kind != "samples":
        log.add(at, f"{describe} takes one stream of samples but the link carries "
                f"{len(stream.channels)} channels; select one channel with 'select'")
        return False
    if port.kind == "channels" and stream.kind != "channels":
        log.add(at, f"{describe} takes several channels side by side but the link carries one stream; "
                f"select two or more channels, or 'all'")
        return False
    if stream.sample_type not in port.sample_types:
        log.add(at, f"{describe} takes {'/'.join(port.sample_types)} samples but the link carries "
                f"{stream.sample_type}")
        return False
    return True


#: A selection that takes every channel of an output no other link or per-channel rule takes.
REST = "rest"


class _Expander:
    def __init__(self, log: ProblemLog, decls: dict[str, Declaration], flow_path: Path, output_dir: Path,
                 raw_links: list[RawLink]) -> None:
        self.log = log
        self.decls = decls
        self.raw_links = raw_links
        self.flow_path = flow_path
        self.output_dir = output_dir
        self.instances: dict[str, Instance] = {}
        self.links: list[Link] = []
        self.made: dict[str, list[str]] = {}          # declared name -> its instance names

    def selection(self, at: KeyPath, select: Any, stream: StreamInfo, tolerance: float | None,
                  source: tuple[str, str]) -> list[int] | None:
        if select == REST:
            return self.rest(at, stream, source)
        try:
            return resolve_selection(select, stream, tolerance)
        except SelectionError as error:
            self.log.add(at, str(error))
            return None

    def others_from(self, source: tuple[str, str], at: KeyPath) -> list[tuple[KeyPath, Any, float | None]]:
        """(where, select, tolerance) of every other link and per-channel rule that takes from ``source``."""
        found = []
        for raw in self.raw_links:
            where: KeyPath = ("links", raw.index, "select")
            if (raw.source, raw.source_port) == source and where != at:
                found.append((where, raw.select, raw.options.tolerance))
        for name, decl in self.decls.items():
            where = ("blocks", name, "per_channel")
            rule = decl.per_channel
            if rule is not None and parse_port_ref(rule.get("from")) == source and where != at:
                try:
                    tolerance = TOLERANCE.convert(rule["tolerance"]) if "tolerance" in rule else None
                except ValueError:
                    tolerance = None
                found.append((where, rule.get("select"), tolerance))
        return found

    def rest(self, at: KeyPath, stream: StreamInfo, source: tuple[str, str]) -> list[int] | None:
        """Columns of ``stream`` that no other selection from ``source`` takes (their own problems are
        reported where they are written)."""
        taken: set[int] = set()
        for where, select, tolerance in self.others_from(source, at):
            if select == REST:
                self.log.add(at, f"{format_key_path(where)} takes \"{REST}\" of {source[0]}.{source[1]} too; only "
                             f"one may")
                return None
            try:
                taken.update(resolve_selection(select, stream, tolerance))
            except SelectionError:
                continue
        columns = [c for c in range(len(stream.channels)) if c not in taken]
        if not columns:
            self.log.add(at, f"no channel of {source[0]}.{source[1]} is left for \"{REST}\": the other links "
                         f"take all {len(stream.channels)}")
            return None
        return columns

    def source_stream(self, link: RawLink) -> tuple[str, StreamInfo, tuple[int, ...] | None] | None:
        """(source instance, stream after the link's selection, selected columns) or None with a problem."""
        if not self.made.get(link.source):
            return None                     # the source had problems of its own, reported already
        if self.decls[link.source].per_channel:
            self.log.add(("links", link.index, "from"), f"{link.source} is per-channel "
                         f"({len(self.made[link.source])} copies); feed its outputs to blocks that are per-channel "
                         f"too, with per_channel = {{ from = \"{link.source}.{link.source_port}\" }}")
            return None
        src = self.made[link.source][0]
        stream = self.instances[src].output_streams.get(link.source_port)
        if stream is None:
            return None
        if link.select is None:
            return src, stream, None
        if stream.kind != "channels":
            self.log.add(("links", link.index, "select"), f"{link.source}.{link.source_port} carries one "
                         f"stream, not channels; there is nothing to select")
            return None
        columns = self.selection(("links", link.index, "select"), link.select, stream, link.options.tolerance,
                                 (link.source, link.source_port))
        if columns is None:
            return None
        return src, stream.select(columns), tuple(columns)

    def per_channel_copies(self, name: str, decl: Declaration) -> list[tuple[str, dict, dict[str, _Feed]]]:
        assert decl.per_channel is not None
        at: KeyPath = ("blocks", name, "per_channel")
        ref = parse_port_ref(decl.per_channel["from"])
        port = next((p for origin, p in decl.feeds if origin == "per_channel"), None)
        if ref is None or port is None or not self.made.get(ref[0]):
            return []
        copies = []
        if self.decls[ref[0]].per_channel:
            if "select" in decl.per_channel:
                self.log.add(at, f"{ref[0]} is already per-channel; leave out 'select' (one copy of {name} "
                             f"follows each copy of {ref[0]})")
                return []
            for src in self.made[ref[0]]:
                inst = self.instances[src]
                stream = inst.output_streams.get(ref[1])
                if stream is not None:
                    copies.append((f"{name}[{inst.placeholders['channel']}]", dict(inst.placeholders),
                                   {port: _Feed(source=src, source_port=ref[1], columns=None, stream=stream,
                                                where=at)}))
            return copies
        src = self.made[ref[0]][0]
        stream = self.instances[src].output_streams.get(ref[1])
        if stream is None:
            return []
        if stream.kind != "channels":
            self.log.add(at, f"{ref[0]}.{ref[1]} carries one stream, not channels; per_channel needs a "
                         f"channelizer's output")
            return []
        tolerance = None
        if "tolerance" in decl.per_channel:
            try:
                tolerance = TOLERANCE.convert(decl.per_channel["tolerance"])
            except ValueError as error:
                self.log.add(at, str(error))
        columns = self.selection(at, decl.per_channel.get("select"), stream, tolerance, ref)
        for c in columns or []:
            channel, hz = stream.channels[c], stream.channel_frequencies[c]
            placeholders = {"channel": channel, "frequency": int(round(hz)), "frequency_mhz": hz / 1e6}
            copies.append((f"{name}[{channel}]", placeholders,
                           {port: _Feed(source=src, source_port=ref[1], columns=(c,), stream=stream.select([c]),
                                        where=at)}))
        return copies

    def single(self, name: str, links: list[RawLink]) -> list[tuple[str, dict, dict[str, _Feed]]]:
        feeds = {}
        for link in links:
            if link.target != name or link.target_port is None:
                continue
            resolved = self.source_stream(link)
            if resolved is not None:
                src, stream, columns = resolved
                feeds[link.target_port] = _Feed(source=src, source_port=link.source_port, columns=columns,
                                                stream=stream, where=("links", link.index), options=link.options)
        return [(name, {}, feeds)]

    def make(self, name: str, decl: Declaration, inst_name: str, placeholders: dict, feeds: dict[str, _Feed]) -> None:
        inputs: dict[str, Link] = {}
        good = True
        for port_name, feed in feeds.items():
            port = decl.cls.find_port(port_name, "input")
            assert port is not None
            at = feed.where + (("to",) if isinstance(feed.where[-1], int) else ())
            if not accepts(self.log, at, port, feed.stream, f"{inst_name}.{port_name}"):
                good = False
                continue
            link = Link(id=len(self.links), where=feed.where, source=feed.source, source_port=feed.source_port,
                        columns=feed.columns, target=inst_name, target_port=port_name, endpoint=None,
                        stream=feed.stream, options=LinkOptions(queue=feed.options.queue,
                                                                when_full=feed.options.when_full,
                                                                latency=feed.options.latency))
            inputs[port_name] = link
            self.instances[feed.source].outputs.setdefault(feed.source_port, []).append(link)
            self.links.append(link)
        unfed = [p.name for p in decl.cls.inputs if p.required and p.name not in inputs]
        if not good or unfed:
            return                       # reported already (unconnected, or fed by a broken link)
        context = BlockContext(inst_name, self.flow_path, self.output_dir, placeholders)
        streams = {port: link.stream for port, link in inputs.items()}
        try:
            output_streams = decl.cls(dict(decl.params), context).output_streams(dict(streams))
        except BlockError as error:
            if error.param:
                self.log.add(("blocks", name, error.param), str(error))
            elif error.port and error.port in inputs:
                where = inputs[error.port].where
                self.log.add(where + (("to",) if where[0] == "links" else ()), f"{inst_name}.{error.port}: {error}")
            else:
                self.log.add(("blocks", name), str(error))
            return
        self.instances[inst_name] = Instance(name=inst_name, declared=name, cls=decl.cls, params=dict(decl.params),
                                             placeholders=placeholders, inputs=inputs, output_streams=output_streams,
                                             policy=decl.policy, host=decl.host,
                                             copies_per_process=decl.copies_per_process)
        self.made[name].append(inst_name)

    def endpoint_links(self, links: list[RawLink]) -> None:
        for raw in links:
            if raw.endpoint is None:
                continue
            resolved = self.source_stream(raw)
            if resolved is None:
                continue
            src, stream, columns = resolved
            link = Link(id=len(self.links), where=("links", raw.index), source=src, source_port=raw.source_port,
                        columns=columns, target=None, target_port=None, endpoint=raw.endpoint, stream=stream,
                        options=raw.options)
            self.instances[src].outputs.setdefault(raw.source_port, []).append(link)
            self.links.append(link)


def default_process_limit() -> int:
    """One block process per 128 MiB of this machine's memory (a worker with numpy and ZeroMQ loaded takes
    60-100 MB), at least 16 and at most 1000."""
    try:
        memory = os.sysconf("SC_PHYS_PAGES") * os.sysconf("SC_PAGE_SIZE")
    except (ValueError, OSError):
        memory = 4 << 30
    return max(16, min(1000, memory // (128 << 20)))


def expand(log: ProblemLog, decls: dict[str, Declaration], links: list[RawLink], order: list[str], *,
           flow_path: Path, output_dir: Path, max_processes: int) -> tuple[dict[str, Instance], list[Link]]:
    """Instances (producers first) and links; problems found on the way go to ``log``. Expansion stops at
    ``max_processes`` instances (a per-channel block could otherwise make thousands)."""
    expander = _Expander(log, decls, flow_path, output_dir, links)
    for name in order:
        decl = decls[name]
        expander.made[name] = []
        if not decl.ok:
            continue                    # its own problems are reported; its outputs are unknown
        copies = expander.per_channel_copies(name, decl) if decl.per_channel else expander.single(name, links)
        for inst_name, placeholders, feeds in copies:
            if len(expander.instances) >= max_processes:
                log.add(("blocks", name), f"the flow would start more than {max_processes} block processes (each "
                        f"per-channel copy is one); the limit is [flow] max_processes — raise it if this machine "
                        f"can carry them")
                return expander.instances, expander.links
            expander.make(name, decl, inst_name, placeholders, feeds)
    expander.endpoint_links(links)
    return expander.instances, expander.links
