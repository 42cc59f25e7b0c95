"""The runtime's own messages: control words (supervisor to workers), events and statistics (workers
to supervisor), and the life cycle of a block as the supervisor sees it.

Control goes over one PUB socket that every worker subscribes to; each
message is one word, or a word and the block it is about (``release NAME``,
``detach NAME``, ``attach NAME``). PUB drops what a subscriber is not yet
connected for, so the supervisor repeats ``go``, ``stop``, ``abort``,
``detach`` and ``attach`` on every turn of its loop while they hold; a worker
takes a repeated word as it took the first. Statistics go back
over PUSH/PULL as a msgpack map (:class:`StatsMessage`), twice a second and
at every change of state. Both sockets live in the run's private folder.

Block states change through :data:`TRANSITIONS`: a worker's event, or the
supervisor seeing the process end, moves a block from one state to the next;
anything the table does not name leaves the state as it is. The one other
move is the supervisor's own: a block that failed under ``on_failure =
"restart"`` is RESTARTING until its new process starts (STARTING again).
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import asdict, dataclass, field, fields, replace
from enum import Enum
from typing import Any

import msgpack
from bandloom.blocks.block import Loss

__all__ = ["BlockState", "Control", "ControlWord", "InletStats", "OutletStats", "ProcessEnd", "StatsMessage",
           "TERMINAL_STATES", "TRANSITIONS", "WorkerEvent", "add_counters", "next_state"]


class ControlWord(str, Enum):
    """What the supervisor tells workers."""

    GO = "go"              # every process has opened its links: sources may start
    STOP = "stop"          # sources end their streams; the rest drains
    ABORT = "abort"        # close everything now
    RELEASE = "release"    # every consumer of the named block has finished: it may close its links
    DETACH = "detach"      # the named block is down: its producers drop what they would send it, counted
    ATTACH = "attach"      # the named block is up (again): its producers send to it


@dataclass(frozen=True)
class Control:
    """One control message: a word, and for ``release`` the block it is for.

    >>> Control.decode(Control(ControlWord.RELEASE, "split").encode())
    Control(word=<ControlWord.RELEASE: 'release'>, block='split')
    """

    word: ControlWord
    block: str | None = None

    def encode(self) -> bytes:
        return self.word.value.encode() + (b" " + self.block.encode() if self.block else b"")

    @classmethod
    def decode(cls, raw: bytes) -> Control | None:
        """The message, or None for bytes that are not one (ignored by workers)."""
        word, _, block = raw.decode(errors="replace").partition(" ")
        try:
            return cls(ControlWord(word), block or None)
        except ValueError:
            return None


class WorkerEvent(str, Enum):
    """What a worker reports about itself (the ``event`` of a statistics message)."""

    HELLO = "hello"        # built its block and opened its links
    STATS = "stats"        # still working
    ENDING = "ending"      # sent its ends of stream; waits to be released
    DONE = "done"          # finished and closed
    ABORTED = "aborted"    # stopped by an abort
    ERROR = "error"        # failed; the message says why


class ProcessEnd(str, Enum):
    """How the supervisor saw a worker process end."""

    CLEAN = "exit status 0"
    FAULT = "exit status other than 0, or a signal"


class BlockState(str, Enum):
    """A block's state in the supervisor."""

    STARTING = "starting"
    RUNNING = "running"
    ENDING = "ending"
    DONE = "done"
    ABORTED = "aborted"
    ERROR = "error"        # reported an error; its process has not ended yet
    FAILED = "failed"      # reported an error, and its process ended
    DIED = "died"          # its process ended without saying why
    RESTARTING = "restarting"  # failed or died; a new process takes its place after the restart delay

    @property
    def is_failure(self) -> bool:
        return self in (BlockState.FAILED, BlockState.DIED)


TERMINAL_STATES = frozenset({BlockState.DONE, BlockState.ABORTED, BlockState.FAILED, BlockState.DIED})

_S, _E, _P = BlockState, WorkerEvent, ProcessEnd
_LIVE = (_S.STARTING, _S.RUNNING, _S.ENDING)

#: (state, what happened) -> the next state.
TRANSITIONS: Mapping[tuple[BlockState, WorkerEvent | ProcessEnd], BlockState] = {
    **{(s, e): _S.RUNNING for s in (_S.STARTING, _S.RUNNING) for e in (_E.HELLO, _E.STATS)},
    **{(s, _E.ENDING): _S.ENDING for s in _LIVE},
    **{(s, _E.DONE): _S.DONE for s in _LIVE},
    **{(s, _E.ABORTED): _S.ABORTED for s in _LIVE},
    **{(s, _E.ERROR): _S.ERROR for s in _LIVE},
    **{(s, _P.CLEAN): _S.DONE for s in _LIVE},
    **{(s, _P.FAULT): _S.DIED for s in _LIVE},
    (_S.ERROR, _P.CLEAN): _S.FAILED,
    (_S.ERROR, _P.FAULT): _S.FAILED,
}


def next_state(state: BlockState, happened: WorkerEvent | ProcessEnd) -> BlockState:
    """The state after ``happened``; unchanged when the table has no such step.

    >>> next_state(BlockState.RUNNING, WorkerEvent.ERROR), next_state(BlockState.ERROR, ProcessEnd.CLEAN)
    (<BlockState.ERROR: 'error'>, <BlockState.FAILED: 'failed'>)
    """
    return TRANSITIONS.get((state, happened), state)


@dataclass(frozen=True, kw_only=True)
class OutletStats:
    """Counters of the sending end of one link (rows are samples, or frames of a channels stream)."""

    rows: int = 0                # delivered to the socket
    messages: int = 0
    seq: int = 0                 # sequence number of the next message
    dropped_rows: int = 0        # dropped here because the link was full (when_full = "drop")
    dropped_messages: int = 0
    discontinuities: int = 0     # messages flagged as following a gap
    missing_rows: int = 0        # lost before this link, counted in the headers
    down_rows: int = 0           # of dropped_rows: dropped while the consumer was down (restarting, or left down)
    next_index: int = 0          # absolute index after the last row sent
    blocked_seconds: float = 0.0
    held_rows: int = 0           # offered, waiting to fill a message (see links.Outlet); sent at end of stream
    copied_bytes: int = 0        # copied by the outlet: to gather the link's channels, change their type, batch
                                 # rows, or place them in shared memory
    shared_messages: int = 0     # of messages: their samples went through shared memory (see shared_rings)
    # endpoints for outside programs only (None on links between blocks):
    delivered_rows: int | None = None    # acknowledged by a consumer
    consumers: int = 0                   # consumers that attached, one after another
    resent_messages: int = 0             # sent again to a new consumer because the last one did not acknowledge them
    refused: int = 0                     # consumers turned away because another one was attached


@dataclass(frozen=True, kw_only=True)
class InletStats:
    """Counters of the receiving end of one link."""

    rows: int = 0
    messages: int = 0
    seq: int = -1                # sequence number of the last message read
    gaps: int = 0
    missing: int = 0
    next_index: int = 0          # absolute index after the last row received (or counted missing)
    lost_at_restart: int = 0     # sent to the instance before a restart, read by none (part of ``missing``)


#: Counters that say where a link's end stands (taken from the later instance), not how much it did.
_POSITIONS = frozenset({"seq", "next_index", "held_rows"})


def add_counters(earlier: OutletStats | InletStats | None, later: OutletStats | InletStats | None) -> Any:
    """One end of a link over two instances of its block (before and after a restart): counts add up,
    positions are the later instance's.

    >>> add_counters(InletStats(rows=5, next_index=5), InletStats(rows=3, next_index=9, missing=1))
    InletStats(rows=8, messages=0, seq=-1, gaps=0, missing=1, next_index=9, lost_at_restart=0)
    """
    if earlier is None or later is None:
        return later if earlier is None else earlier
    values = {}
    for f in fields(later):
        a, b = getattr(earlier, f.name), getattr(later, f.name)
        values[f.name] = b if f.name in _POSITIONS or a is None or b is None else a + b
    return replace(later, **values)


@dataclass(frozen=True, kw_only=True)
class StatsMessage:
    """A worker's report: its event, counters per link id, and (at the end) its report lines.

    >>> m = StatsMessage(event=WorkerEvent.DONE, block="keep", pid=7, time=1.5, outputs={3: OutletStats(rows=9)})
    >>> StatsMessage.decode(m.encode()) == m
    True
    """

    event: WorkerEvent
    block: str
    pid: int
    time: float                  # seconds since the worker started
    rows_in: int = 0
    rows_out: int = 0
    inputs: dict[int, InletStats] = field(default_factory=dict)
    outputs: dict[int, OutletStats] = field(default_factory=dict)
    progress: tuple[int, int] | None = None
    report: list[str] = field(default_factory=list)
    losses: list[Loss] = field(default_factory=list)     # what the block itself lost, so far
    message: str = ""
    # for 'bandloom bench --flow': CLOCK_MONOTONIC seconds (one clock for every process of the machine)
    started_clock: float = 0.0                 # when the worker process began
    first_rows_clock: float | None = None      # when its block first took (or, a source, made) rows
    busy_seconds: float = 0.0                  # spent inside the block's own code (produce, consume, finish)
    cpu_seconds: float = 0.0                   # CPU time of the whole process, every thread, user and system

    def then(self, later: StatsMessage) -> StatsMessage:
        """This instance's last statistics followed by those of the instance that took its place:
        counters of each link added up, losses of both, the rest from ``later``."""
        def combined(mine: dict[int, Any], theirs: dict[int, Any]) -> dict[int, Any]:
            return {k: add_counters(mine.get(k), theirs.get(k)) for k in {**mine, **theirs}}

        return replace(later, rows_in=self.rows_in + later.rows_in, rows_out=self.rows_out + later.rows_out,
                       losses=self.losses + later.losses, busy_seconds=self.busy_seconds + later.busy_seconds,
                       cpu_seconds=self.cpu_seconds + later.cpu_seconds,
                       first_rows_clock=self.first_rows_clock or later.first_rows_clock, inputs=combined(self.inputs, later.inputs),
                       outputs=combined(self.outputs, later.outputs))

    def encode(self) -> bytes:
        values = asdict(self)
        values["event"] = self.event.value
        return msgpack.packb(values, use_bin_type=True)

    @classmethod
    def decode(cls, raw: bytes) -> StatsMessage:
        """Messages come from the run's own workers over a private socket; still, unpack with limits."""
        values: dict[str, Any] = msgpack.unpackb(raw, raw=False, strict_map_key=False, max_bin_len=0)
        values["event"] = WorkerEvent(values["event"])
        values["inputs"] = {int(k): InletStats(**v) for k, v in values.get("inputs", {}).items()}
        values["outputs"] = {int(k): OutletStats(**v) for k, v in values.get("outputs", {}).items()}
        values["losses"] = [Loss(**v) for v in values.get("losses", [])]
        if values.get("progress") is not None:
            values["progress"] = tuple(values["progress"])
        return cls(**values)
