"""What a block is: declared parameters and ports, stream descriptions, chunks.

A block type is a class derived from :class:`Block` with class attributes
``type_name``, ``summary``, ``parameters``, ``inputs`` and ``outputs``. The
runtime validates a flow against these declarations, then, in the block's own
process, creates the block and feeds it chunks. Nothing here knows about
sockets or processes.

Streams
-------
A port carries one of two kinds of stream, described by :class:`StreamInfo`:

* ``"samples"``: one stream of samples; a chunk's ``data`` is 1-D.
* ``"channels"``: several channels from one channelizer side by side; a
  chunk's ``data`` is 2-D, one row per time step (frame) and one column per
  channel, in the order of ``StreamInfo.channels``.

``first_index`` of a chunk is the absolute index (at the stream's own rate,
from 0) of its first row. A block that skips rows simply starts its next
chunk at a later ``first_index``; the runtime sees the jump and marks the
message as a discontinuity. A chunk a block receives after a gap has
``discontinuity`` set and ``dropped`` = the number of rows missing just
before it (lost upstream or dropped by an overloaded link).

``produce``, ``consume`` and ``finish`` return ``{output port: [Chunk, ...]}``.
"""

from __future__ import annotations

import sys
import time
from collections.abc import Callable, Iterator, Mapping
from dataclasses import asdict, dataclass, field, replace
from pathlib import Path
from typing import IO, Any, ClassVar

import numpy as np

from .output_files import open_output_file
from .params import REQUIRED, Param, toml_repr
from .sample_formats import STREAM_TYPES

__all__ = ["Block", "BlockContext", "BlockError", "Chunk", "Loss", "Output", "Param", "Pacer", "Port", "REQUIRED",
           "SAMPLE_TYPES", "StreamInfo", "chunks_of", "toml_repr"]

SAMPLE_TYPES = STREAM_TYPES


class BlockError(ValueError):
    """A block refuses its parameters or its input streams; the message says why and what would do.

    ``param`` names the parameter at fault, if one is; ``port`` the input port.
    """

    def __init__(self, message: str, *, param: str | None = None, port: str | None = None) -> None:
        super().__init__(message)
        self.param = param
        self.port = port


@dataclass(frozen=True)
class Port:
    """A declared port: ``kind`` is ``samples``, ``channels`` or ``any``;
    ``sample_types`` lists what it carries or accepts."""

    name: str
    kind: str
    doc: str
    sample_types: tuple[str, ...] = ("cf32",)
    required: bool = True


@dataclass(frozen=True)
class StreamInfo:
    """Description of the stream on a port (see module doc).

    ``sample_rate`` in Hz; ``centre_frequency`` in Hz is the RF frequency at
    0 Hz of this stream (for a ``channels`` stream: of the band the channels
    were cut from); ``channels`` are channel indices (FFT order) and
    ``channel_frequencies`` their centres in Hz; ``channel_count`` is the
    channelizer's M and ``channel_spacing`` the distance between adjacent
    channel centres in Hz; ``design`` the channelizer's design knobs (so a synthesis
    block can match them).

    ``to_dict`` and ``from_dict`` carry a description between processes as
    plain JSON-able values:

    >>> s = StreamInfo("channels", "cf32", 50e3, 156e6, channels=(0, 1), channel_frequencies=(156e6, 156.025e6))
    >>> StreamInfo.from_dict(s.to_dict()) == s, s.width
    (True, 2)
    """

    kind: str
    sample_type: str
    sample_rate: float
    centre_frequency: float = 0.0
    channels: tuple[int, ...] = ()
    channel_frequencies: tuple[float, ...] = ()
    channel_count: int = 0
    channel_spacing: float = 0.0
    design: dict[str, Any] = field(default_factory=dict, compare=False)
    start_time: str | None = None

    @property
    def width(self) -> int:
        """Columns of a chunk's data: the number of channels, or 1 for a samples stream."""
        return len(self.channels) if self.kind == "channels" else 1

    @property
    def dtype(self) -> np.dtype:
        return SAMPLE_TYPES[self.sample_type]

    @property
    def row_bytes(self) -> int:
        """Bytes of one row of a chunk (one sample of every column)."""
        return self.width * self.dtype.itemsize

    @property
    def bytes_per_second(self) -> float:
        """What the stream carries at its sample rate, in bytes per second."""
        return self.sample_rate * self.row_bytes

    def select(self, columns: list[int]) -> StreamInfo:
        """The stream carrying only ``columns`` (positions in ``channels``); one column gives samples."""
        if self.kind != "channels":
            raise BlockError("only a channels stream can be selected from")
        if len(columns) == 1:
            c = columns[0]
            return StreamInfo("samples", self.sample_type, self.sample_rate, self.channel_frequencies[c],
                              channels=(self.channels[c],), channel_frequencies=(self.channel_frequencies[c],),
                              channel_count=self.channel_count, channel_spacing=self.channel_spacing,
                              design=self.design, start_time=self.start_time)
        return replace(self, channels=tuple(self.channels[c] for c in columns),
                       channel_frequencies=tuple(self.channel_frequencies[c] for c in columns))

    def to_dict(self) -> dict[str, Any]:
        """Plain values (lists for tuples) for JSON or msgpack."""
        return asdict(self)

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> StreamInfo:
        """The inverse of :meth:`to_dict`."""
        values = dict(data)
        for key in ("channels", "channel_frequencies"):
            values[key] = tuple(values.get(key) or ())
        return cls(**values)


@dataclass
class Chunk:
    """A piece of a stream: ``data`` plus where it sits in absolute time (see module doc)."""

    data: np.ndarray
    first_index: int
    discontinuity: bool = False
    dropped: int = 0

    @property
    def count(self) -> int:
        return len(self.data)

    def filled_pieces(self, rows: int = 1 << 20) -> Iterator[np.ndarray]:
        """:meth:`with_gap_filled` in pieces of at most ``rows`` zero rows, then ``data``: memory stays
        bounded whatever ``dropped`` claims (a writer keeps absolute time piece by piece)."""
        left = self.dropped
        while left > 0:
            n = min(rows, left)
            yield np.zeros((n,) + self.data.shape[1:], self.data.dtype)
            left -= n
        if len(self.data):
            yield self.data

    def with_gap_filled(self) -> np.ndarray:
        """``data`` preceded by ``dropped`` zero rows: the stream with its gap kept in absolute time."""
        if not self.dropped:
            return self.data
        zeros = np.zeros((self.dropped,) + self.data.shape[1:], self.data.dtype)
        return np.concatenate([zeros, self.data])


@dataclass(frozen=True)
class Loss:
    """Samples a block lost itself (not lost upstream of it), why, and whether the flow chose to allow it
    (a live source told to drop rather than wait). The run's verdict lists every one."""

    samples: int
    reason: str
    accepted: bool = False


#: What ``produce``, ``consume`` and ``finish`` return: chunks by output port.
Output = Mapping[str, "list[Chunk] | Chunk"]


def chunks_of(value: list[Chunk] | Chunk) -> list[Chunk]:
    """One port's part of an :data:`Output` as a list (a block may give one chunk or a list)."""
    return value if isinstance(value, list) else [value]


@dataclass(frozen=True)
class BlockContext:
    """Where a block instance lives: its name, the flow's folder and the output folder.

    ``placeholders`` are the values a per-channel copy fills into its output
    paths (``{channel}``, ``{frequency}``, ``{frequency_mhz}``). ``restart`` is
    how many instances of the block ran before this one (0: the first; see
    :attr:`Block.restartable`); ``resumed_at`` gives, per input port of a
    restarted instance, the absolute index up to which its predecessors last
    reported having received (what they received after that report is
    counted lost at the restart).

    ``output_room(port, shape, dtype)``, when the runtime gives it, lends
    memory for the block's next chunk on ``port`` (an array of that shape
    and dtype, or None): rows written there are sent from where they lie,
    with no copy (a shared-memory ring). A block that asks must return its
    next chunk on that port in that array (all its rows, or the first ones)
    before any other chunk on the port; what it does not use is taken back.
    """

    name: str
    flow_path: Path
    output_dir: Path
    placeholders: dict[str, Any] = field(default_factory=dict)
    restart: int = 0
    resumed_at: dict[str, int] = field(default_factory=dict)
    design_folder: Path | None = None     # banks designed already, to load instead of designing again
    output_room: Callable[[str, tuple[int, ...], np.dtype], np.ndarray | None] | None = None

    def input_path(self, text: str) -> Path:
        """A path from the flow file: relative to the flow file's folder."""
        path = Path(text).expanduser()
        return path if path.is_absolute() else self.flow_path.parent / path

    def output_path(self, text: str) -> Path:
        """A path to write, placeholders filled: relative to the run's output folder and always inside it
        (BlockError for an absolute path, ``~``, a ``..`` part, or a placeholder that renders as one)."""
        rendered = text.format_map(self.placeholders)
        path = Path(rendered)
        if path.is_absolute() or rendered.startswith("~") or ".." in path.parts or not path.parts:
            shown = f" (from {text!r})" if rendered != text else ""
            raise BlockError(f"{rendered!r}{shown} would be written outside the output folder; output paths are "
                             f"relative to it, without '..', '~' or a leading '/' (choose the folder with --out)")
        return self.output_dir / path


class Pacer:
    """Sleeps so that rows leave no faster than ``rate`` per second, counted from creation."""

    def __init__(self, rate: float) -> None:
        self.rate = rate
        self.started = time.monotonic()

    def wait_until(self, rows: int) -> None:
        """Return once ``rows`` rows are due (at once if they are already late)."""
        delay = self.started + rows / self.rate - time.monotonic()
        if delay > 0:
            time.sleep(delay)


class Block:
    """Base class of every block type.

    A block type declares itself in class attributes and is fed chunks by the
    runtime, in a process of its own; it never sees sockets.

    Attributes
    ----------
    type_name : str
        The name flow files use (plain words, hyphenated), also the entry-point name.
    summary : str
        One line for ``bandloom blocks``.
    parameters : tuple of Param
        Declared parameters; the runtime checks and converts values before the block is made.
    inputs, outputs : tuple of Port
        Declared ports.
    is_source : bool
        True for blocks without inputs that ``produce`` chunks.
    length_parameter : str or None
        For a finite source, the parameter (a count or a duration) that sets
        how much it produces: ``bandloom bench --flow`` scales it to run the
        flow at two lengths.
    restartable : bool
        True when a new instance can take over part way through the streams
        (``on_failure = "restart"``): its first chunk on each input comes at a
        later ``first_index``, with ``dropped`` = ``first_index`` (it has seen
        nothing before), and ``context.restart`` > 0. It must keep absolute
        time from there, as for any gap; a writer continues the file its
        predecessor wrote.

    Notes
    -----
    Life cycle: ``__init__(params, context)`` (set every counter a report
    reads here), ``output_streams`` (at check time and again at run time),
    ``start``, then ``produce`` (sources) or ``consume`` / ``finish``, and
    always ``close`` and ``report`` last, also after a failure.

    Examples
    --------
    A block that halves its input, run by hand as the runtime would run it:

    >>> class Half(Block):
    ...     type_name = "half"
    ...     summary = "Multiply by one half."
    ...     inputs = (Port("samples", "samples", "IQ"),)
    ...     outputs = (Port("samples", "samples", "IQ, halved"),)
    ...     def output_streams(self, inputs):
    ...         return {"samples": inputs["samples"]}
    ...     def consume(self, port, chunk):
    ...         return {"samples": [Chunk(chunk.data / 2, chunk.first_index)]}
    >>> block = Half({}, BlockContext("half", Path("flow.toml"), Path(".")))
    >>> out = block.consume("samples", Chunk(np.ones(3, np.complex64), first_index=0))
    >>> out["samples"][0].data.real.tolist()
    [0.5, 0.5, 0.5]
    """

    type_name: ClassVar[str] = ""
    summary: ClassVar[str] = ""
    parameters: ClassVar[tuple[Param, ...]] = ()
    inputs: ClassVar[tuple[Port, ...]] = ()
    outputs: ClassVar[tuple[Port, ...]] = ()
    is_source: ClassVar[bool] = False
    restartable: ClassVar[bool] = False
    details: ClassVar[str] = ""             # more than a parameter's line holds (a list's table keys), plain text
    uses_stdin: ClassVar[bool] = False     # the one block of a flow that reads the run's standard input
    uses_stdout: ClassVar[bool] = False    # the one block of a flow that writes data to the run's standard output
    length_parameter: ClassVar[str | None] = None   # a finite source's parameter that sets how long it runs

    def __init__(self, params: dict[str, Any], context: BlockContext) -> None:
        self.params = params
        self.context = context
        self._stopping = False

    # Check time and run time -------------------------------------------------
    def output_streams(self, inputs: dict[str, StreamInfo]) -> dict[str, StreamInfo]:
        """Return ``{output port: StreamInfo}`` given ``{input port: StreamInfo}``.

        Raise :class:`BlockError` if the inputs are not acceptable (wrong rate,
        wrong width, ...). Called by ``bandloom check`` and again at run time.
        """
        return {}

    @classmethod
    def preload(cls) -> None:
        """Import and warm, once, what the block needs at run time (compiled kernels, heavy modules): the
        runtime calls this in the process its workers are forked from, so each worker has them at no cost.
        The default does nothing."""

    # Run time -----------------------------------------------------------------
    def start(self, inputs: dict[str, StreamInfo]) -> None:
        """Open files and build state; ``inputs`` as for :meth:`output_streams`."""

    def begin(self) -> None:
        """Sources: every consumer is ready; start taking input now (a live source starts reading here).
        Called once, after :meth:`start`, before the first :meth:`produce`."""

    def produce(self) -> Output | None:
        """Sources: the next ``{port: [Chunk, ...]}``, or None at the end of the stream."""
        return None

    def consume(self, port: str, chunk: Chunk) -> Output:
        """Take a chunk on an input port; return ``{output port: [Chunk, ...]}`` (may be empty)."""
        return {}

    def finish(self) -> Output:
        """All inputs have ended: return any last ``{port: [Chunk, ...]}``."""
        return {}

    def close(self) -> None:
        """Always called last, also on abort: flush and close files."""

    def report(self) -> list[str]:
        """Lines for the run summary (for example a measured error); default none."""
        return []

    def losses(self) -> list[Loss]:
        """Samples this block lost itself, with the reason; default none. Gaps that arrived from upstream
        are counted where they happened and are not repeated here."""
        return []

    def progress(self) -> tuple[int, int] | None:
        """Sources that know their length: (rows done, rows in all) for the status display; else None."""
        return None

    def end_index(self, port: str) -> int | None:
        """The absolute index just after the stream's last row on output ``port``, when that is
        beyond the last chunk produced (a live source that dropped its final buffers, a
        channelizer that skipped frames of silence after a final gap); None otherwise. The end of
        stream then counts the difference as missing rows."""
        return None

    def stop_requested(self) -> None:
        """Sources: the run is being stopped; end the stream at the next produce()."""
        self._stopping = True

    @property
    def stopping(self) -> bool:
        return self._stopping

    # Helpers for block types ----------------------------------------------------
    def open_output(self, text: str, mode: str = "wb", **options: Any) -> tuple[Path, IO[Any]]:
        """Open the output file named by parameter text ``text`` (placeholders filled, relative to
        the run's output folder), making its folder; return (path, open file). Binary files are
        unbuffered and write whole or raise; every write error names the file
        (:mod:`.output_files`)."""
        path = self.context.output_path(text)
        path.parent.mkdir(parents=True, exist_ok=True)
        return path, open_output_file(path, mode, **options)

    def kept_from_predecessor(self, port: str) -> int | None:
        """For a restarted instance (:attr:`restartable`), called after :meth:`start`: the absolute index
        up to which the failed instance's work on input ``port`` is kept (for a writer, the samples its
        file holds), or None when nothing of it is kept. What it read after its last report up to there
        then counts as received, not lost at the restart."""
        return None

    def warn(self, message: str) -> None:
        """One line on the run's stderr, naming this block."""
        print(f"{self.context.name}: warning: {message}", file=sys.stderr)

    @classmethod
    def find_port(cls, name: str, direction: str) -> Port | None:
        """The declared ``input`` or ``output`` port called ``name``, or None."""
        for p in (cls.inputs if direction == "input" else cls.outputs):
            if p.name == name:
                return p
        return None
