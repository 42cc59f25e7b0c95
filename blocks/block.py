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

import difflib
from dataclasses import dataclass, field, replace
from pathlib import Path

import numpy as np

from .units import UnitError, parse_quantity

SAMPLE_TYPES = {"cf32": np.dtype(np.complex64), "f32": np.dtype(np.float32)}

REQUIRED = object()


def toml_repr(value):
    """A value as it would be written in TOML, for messages: true, "text", 16, [1, 2]."""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, str):
        return '"' + value.replace("\\", "\\\\").replace('"', '\\"') + '"'
    if isinstance(value, list):
        return "[" + ", ".join(toml_repr(v) for v in value) + "]"
    if isinstance(value, dict):
        return "{ " + ", ".join(f"{k} = {toml_repr(v)}" for k, v in value.items()) + " }"
    return repr(value)


class BlockError(ValueError):
    """A block refuses its parameters or its input streams; the message says why and what would do.

    ``param`` names the parameter at fault, if one is; ``port`` the input port.
    """

    def __init__(self, message, *, param=None, port=None):
        super().__init__(message)
        self.param = param
        self.port = port


@dataclass(frozen=True)
class Param:
    """A declared parameter.

    ``kind`` is one of ``int``, ``float``, ``str``, ``bool``, ``choice``,
    ``quantity`` (a number with ``unit``: Hz, s, dB or dBFS), ``input-path``
    (a file that must exist, relative to the flow file's folder),
    ``output-path`` (relative to the run's output folder; may contain
    ``{channel}``-style placeholders), ``channels`` (a channel selection, see
    docs/flow-files.md) or ``list``.
    """

    name: str
    kind: str
    doc: str
    default: object = REQUIRED
    unit: str | None = None
    choices: tuple = ()
    minimum: float | None = None
    maximum: float | None = None

    @property
    def required(self):
        return self.default is REQUIRED

    def describe_type(self):
        if self.kind == "quantity":
            return f"number in {self.unit}"
        if self.kind == "choice":
            return "one of " + ", ".join(toml_repr(c) for c in self.choices)
        return {"int": "whole number", "float": "number", "str": "text", "bool": "true or false",
                "input-path": "path of an existing file", "output-path": "path of a file to write",
                "list": "list", "channels": "channel selection"}.get(self.kind, self.kind)

    def convert(self, value):
        """Check and convert a value from the flow file; raise ValueError saying what was expected."""
        kind = self.kind
        if kind == "int":
            if isinstance(value, bool) or not isinstance(value, int):
                raise ValueError(f"expected a whole number, got {toml_repr(value)}")
            value = int(value)
        elif kind == "float":
            if isinstance(value, bool) or not isinstance(value, (int, float)):
                raise ValueError(f"expected a number, got {toml_repr(value)}")
            value = float(value)
        elif kind == "quantity":
            try:
                value = parse_quantity(value, self.unit)
            except UnitError as error:
                raise ValueError(str(error)) from None
        elif kind == "bool":
            if not isinstance(value, bool):
                raise ValueError(f"expected true or false, got {toml_repr(value)}")
        elif kind in ("str", "input-path", "output-path"):
            if not isinstance(value, str) or not value:
                raise ValueError(f"expected {self.describe_type()} as a quoted string, got {toml_repr(value)}")
        elif kind == "choice":
            if value not in self.choices:
                hint = difflib.get_close_matches(str(value), [str(c) for c in self.choices], n=1)
                extra = f" (did you mean {toml_repr(hint[0])}?)" if hint else ""
                raise ValueError(f"expected one of {', '.join(toml_repr(c) for c in self.choices)}, "
                                 f"got {toml_repr(value)}{extra}")
        elif kind == "list":
            if not isinstance(value, list):
                raise ValueError(f"expected a list, got {toml_repr(value)}")
        if self.minimum is not None and isinstance(value, (int, float)) and value < self.minimum:
            raise ValueError(f"expected at least {self.minimum:g}, got {toml_repr(value)}")
        if self.maximum is not None and isinstance(value, (int, float)) and value > self.maximum:
            raise ValueError(f"expected at most {self.maximum:g}, got {toml_repr(value)}")
        return value


@dataclass(frozen=True)
class Port:
    """A declared port: ``kind`` is ``samples``, ``channels`` or ``any``;
    ``sample_types`` lists what it carries or accepts."""

    name: str
    kind: str
    doc: str
    sample_types: tuple = ("cf32",)
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
    """

    kind: str
    sample_type: str
    sample_rate: float
    centre_frequency: float = 0.0
    channels: tuple = ()
    channel_frequencies: tuple = ()
    channel_count: int = 0
    channel_spacing: float = 0.0
    design: dict = field(default_factory=dict, compare=False)
    start_time: str | None = None

    @property
    def width(self):
        return len(self.channels) if self.kind == "channels" else 1

    @property
    def dtype(self):
        return SAMPLE_TYPES[self.sample_type]

    def select(self, columns):
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


@dataclass
class Chunk:
    """A piece of a stream: ``data`` plus where it sits in absolute time (see module doc)."""

    data: np.ndarray
    first_index: int
    discontinuity: bool = False
    dropped: int = 0

    @property
    def count(self):
        return len(self.data)


@dataclass(frozen=True)
class BlockContext:
    """Where a block instance lives: its name, the flow's folder and the output folder."""

    name: str
    flow_path: Path
    output_dir: Path
    placeholders: dict = field(default_factory=dict)

    def input_path(self, text):
        path = Path(text).expanduser()
        return path if path.is_absolute() else self.flow_path.parent / path

    def output_path(self, text):
        path = Path(text.format_map(self.placeholders)).expanduser()
        return path if path.is_absolute() else self.output_dir / path


class Block:
    """Base class of every block type; see the module doc and DEVELOPERS.md."""

    type_name = ""
    summary = ""
    parameters: tuple = ()
    inputs: tuple = ()
    outputs: tuple = ()
    is_source = False
    uses_stdin = False     # the one block of a flow that reads the run's standard input
    uses_stdout = False    # the one block of a flow that writes data to the run's standard output

    def __init__(self, params, context):
        self.params = params
        self.context = context

    # Check time and run time -------------------------------------------------
    def output_streams(self, inputs):
        """Return ``{output port: StreamInfo}`` given ``{input port: StreamInfo}``.

        Raise :class:`BlockError` if the inputs are not acceptable (wrong rate,
        wrong width, ...). Called by ``bandloom check`` and again at run time.
        """
        return {}

    # Run time -----------------------------------------------------------------
    def start(self, inputs):
        """Open files and build state; ``inputs`` as for :meth:`output_streams`."""

    def produce(self):
        """Sources: the next ``{port: [Chunk, ...]}``, or None at the end of the stream."""
        return None

    def consume(self, port, chunk):
        """Take a chunk on an input port; return ``{output port: [Chunk, ...]}`` (may be empty)."""
        return {}

    def finish(self):
        """All inputs have ended: return any last ``{port: [Chunk, ...]}``."""
        return {}

    def close(self):
        """Always called last, also on abort: flush and close files."""

    def report(self):
        """Lines for the run summary (for example a measured error); default none."""
        return []

    def progress(self):
        """Sources that know their length: (rows done, rows in all) for the status display; else None."""
        return None

    def end_index(self, port):
        """The absolute index just after the stream's last row on output ``port``, when that is
        beyond the last chunk produced (a live source that dropped its final buffers, a
        channelizer that skipped frames of silence after a final gap); None otherwise. The end of
        stream then counts the difference as missing rows."""
        return None

    def stop_requested(self):
        """Sources: the run is being stopped; end the stream at the next produce()."""
        self._stopping = True

    @property
    def stopping(self):
        return getattr(self, "_stopping", False)

    @classmethod
    def find_param(cls, name):
        for p in cls.parameters:
            if p.name == name:
                return p
        return None

    @classmethod
    def find_port(cls, name, direction):
        for p in (cls.inputs if direction == "input" else cls.outputs):
            if p.name == name:
                return p
        return None
