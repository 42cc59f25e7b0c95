"""A checked flow: block instances (one process each) and the links between them.

These are what :func:`~bandloom.runtime.flow.load_flow` returns and what the
supervisor runs. Everything is frozen; the only thing filled in after an
object is made is the list of links leaving an instance's output port, while
the flow is being expanded.
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass, field
from enum import Enum
from pathlib import Path
from typing import Any

from bandloom.blocks.block import Block, StreamInfo

from .problems import KeyPath, format_key_path

__all__ = ["FailurePolicy", "Flow", "Host", "Instance", "Link", "LinkOptions", "OnFailure", "WhenFull", "process_groups"]


class WhenFull(str, Enum):
    """What a link does when its queue is full."""

    WAIT = "wait"       # lossless: the producer waits (backpressure)
    DROP = "drop"       # the message is dropped whole, counted, and the gap flagged


class OnFailure(str, Enum):
    """What the run does when a block's process fails or dies."""

    STOP = "stop"           # the run fails: every other block is aborted (the default)
    RESTART = "restart"     # a new process takes the block's place; what it missed is a counted gap
    CONTINUE = "continue"   # the block stays down, the rest of the flow runs on; the run fails at its end


@dataclass(frozen=True, kw_only=True)
class FailurePolicy:
    """A block's ``on_failure``, ``restarts`` and ``restart_delay`` (declared in
    :data:`~.declarations.BLOCK_OPTIONS`). The n-th restart (1-based) waits
    ``restart_delay * 2**(n - 1)`` seconds; after ``restarts`` restarts a further
    failure stops the run."""

    on_failure: OnFailure = OnFailure.STOP
    restarts: int = 3
    restart_delay: float = 1.0      # seconds

    def delay(self, restart: int) -> float:
        """Seconds to wait before restart number ``restart`` (1-based)."""
        return self.restart_delay * 2 ** (restart - 1)


@dataclass(frozen=True, kw_only=True)
class LinkOptions:
    """A link's options from the flow file (declared in :data:`~.declarations.LINK_OPTIONS`)."""

    queue: int = 8
    when_full: WhenFull = WhenFull.WAIT
    latency: float = 0.05            # s that rows may wait in the sender to fill a message (0: none)
    insecure: bool = False
    keys: str | None = None          # folder made by 'bandloom keys', resolved against the flow's folder
    tolerance: float | None = None   # Hz, for selection by frequency


@dataclass(frozen=True, kw_only=True)
class Link:
    """One link after expansion: a producer's output to a consumer's input, or to a fixed endpoint.

    ``columns`` are positions in the source stream's channels (None: the
    stream as it is); ``stream`` is what the link carries after selection.
    """

    id: int
    where: KeyPath                   # key path of what declared it, for messages
    source: str                      # instance name
    source_port: str
    columns: tuple[int, ...] | None
    target: str | None               # instance name (None for an endpoint)
    target_port: str | None
    endpoint: str | None             # fixed endpoint for outside consumers
    stream: StreamInfo
    options: LinkOptions = LinkOptions()

    @property
    def label(self) -> str:
        """``source.port[selection] -> target.port`` (or the endpoint), for tables and messages."""
        sel = ""
        if self.columns is not None:
            chans = self.stream.channels
            sel = f"[{chans[0]}]" if len(chans) == 1 else f"[{len(chans)} channels]"
        to = f"{self.target}.{self.target_port}" if self.target else self.endpoint
        return f"{self.source}.{self.source_port}{sel} -> {to}"

    @property
    def declared_at(self) -> str:
        """The key path that declared the link, written for people."""
        return format_key_path(self.where)


@dataclass(frozen=True, kw_only=True)
class Instance:
    """One block process: a declared block, or one channel's copy of a per-channel block."""

    name: str
    declared: str                    # the [blocks.NAME] it comes from
    cls: type[Block]
    params: dict[str, Any]
    placeholders: dict[str, Any] = field(default_factory=dict)
    inputs: dict[str, Link] = field(default_factory=dict)              # port -> link
    outputs: dict[str, list[Link]] = field(default_factory=dict)       # port -> links, filled as consumers appear
    output_streams: dict[str, StreamInfo] = field(default_factory=dict)
    policy: FailurePolicy = FailurePolicy()
    host: str | None = None          # the [hosts.NAME] it runs on (None: a flow without hosts)
    copies_per_process: int = 1      # of a per-channel block: how many of its copies share one process

    @property
    def type_name(self) -> str:
        return self.cls.type_name

    @property
    def input_streams(self) -> dict[str, StreamInfo]:
        return {port: link.stream for port, link in self.inputs.items()}


@dataclass(frozen=True, kw_only=True)
class Host:
    """One ``[hosts.NAME]`` table: a machine that runs a share of the flow (docs/flow-files.md, "Hosts").

    ``address`` is where the other hosts reach it; ``listen`` the local address its share binds;
    ``port`` the first of its TCP ports: the share's own channel to its peers, then one port for
    each link leaving the host, in the order the links appear (see :meth:`Flow.link_port`).
    """

    name: str
    address: str
    listen: str
    port: int

    def endpoint(self, port: int, *, bind: bool) -> str:
        """``tcp://ADDRESS:PORT``: where this host binds (``listen``) or is reached (``address``)."""
        host = self.listen if bind else self.address
        return f"tcp://[{host}]:{port}" if ":" in host else f"tcp://{host}:{port}"


@dataclass(frozen=True, kw_only=True)
class Flow:
    """A flow ready to run: instances in topological order (producers first) and every link.

    A flow with ``hosts`` is run as one share per host (``bandloom run FLOW --host NAME``): each
    instance names its host; a link whose ends are on different hosts *crosses*, and is carried
    over TCP, encrypted with the key folder ``host_keys`` unless ``hosts_insecure``.
    """

    path: Path
    name: str
    description: str
    instances: dict[str, Instance]
    links: list[Link]
    accept_loss: bool = False        # [flow] accept_loss: lost samples do not change the exit status
    shared_memory: bool = True       # [flow] shared_memory: local links pass samples through shared memory
    hosts: dict[str, Host] = field(default_factory=dict)
    host_keys: str | None = None     # [flow] keys: the folder every host holds a copy of
    hosts_insecure: bool = False     # [flow] insecure: links between hosts in the clear

    def crosses(self, link: Link) -> bool:
        """Whether the link's two ends run on different hosts (endpoints for outside programs never do)."""
        if link.target is None:
            return False
        return self.instances[link.source].host != self.instances[link.target].host

    def crossing_links(self) -> list[Link]:
        return [link for link in self.links if self.crosses(link)]

    def link_port(self, link: Link) -> int:
        """The TCP port a crossing link is served on, on its source's host: after the host's own port,
        one for each crossing link leaving that host, in link order."""
        host = self.instances[link.source].host
        leaving = [x.id for x in self.crossing_links() if self.instances[x.source].host == host]
        assert host is not None and link.id in leaving, f"{link.label} does not cross hosts"
        return self.hosts[host].port + 1 + leaving.index(link.id)

    def share(self, host: str) -> list[str]:
        """The instances that run on ``host``, producers first."""
        return [name for name, inst in self.instances.items() if inst.host == host]


def process_groups(instances: Iterable[Instance]) -> list[list[Instance]]:
    """The instances, one list per worker process, in their order: copies of a per-channel block go
    ``copies_per_process`` to a process, every other instance alone."""
    groups: list[list[Instance]] = []
    filling: dict[str, list[Instance]] = {}       # declared block -> its group being filled
    for inst in instances:
        group = filling.get(inst.declared)
        if group is None or len(group) >= inst.copies_per_process:
            group = []
            groups.append(group)
            if inst.copies_per_process > 1:
                filling[inst.declared] = group
        group.append(inst)
    return groups
