"""What the supervisor hands a worker process: its block and its links, as typed values with a JSON form.

The supervisor writes one :class:`WorkerSpec` per block instance to a file in
the run's private folder (a list of them for copies of a per-channel block
that share a process, see ``copies_per_process``) and starts
``python -m bandloom.runtime.worker FILE``; the worker reads it back with
:func:`specs_from_json`. Nothing else passes between them before the run starts.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field, fields
from typing import Any

from bandloom.blocks.block import StreamInfo

from .flow.model import WhenFull

__all__ = ["LinkSpec", "WorkerSpec", "specs_from_json", "specs_to_json"]


@dataclass(frozen=True, kw_only=True)
class LinkSpec:
    """One end of one link, as a worker opens it.

    ``endpoint`` is the ZeroMQ address; ``bind`` says whether this end binds
    it (an input always does; an output only for an endpoint for outside
    programs). ``columns`` picks channels from the block's output (None: all).

    ``consumer`` is the block at the far end of an output (None for an
    endpoint). For a restarted block, ``resume_index`` and ``resume_seq`` are
    where its predecessor's end of this link stood at its last report (None:
    a first instance, starting at 0), and ``attached`` is False on an output
    whose consumer is down when this worker starts (see :class:`.links.Outlet`). ``batch_seconds`` is the
    link's ``latency`` (outputs to other blocks only). ``shared_bytes`` is the data capacity of the link's
    shared-memory ring (see :mod:`.shared_rings`; 0: none), on both ends of a link between two blocks whose
    workers the same launcher forks.
    """

    link: int
    label: str
    endpoint: str
    stream: StreamInfo
    bind: bool = False
    columns: tuple[int, ...] | None = None
    queue: int = 8
    when_full: WhenFull = WhenFull.WAIT
    batch_seconds: float = 0.0       # how long rows may wait to fill a message; 0: each chunk as it is
    keys: str | None = None
    consumer: str | None = None
    attached: bool = True
    resume_index: int | None = None
    resume_seq: int = 0
    shared_bytes: int = 0

    def to_dict(self) -> dict[str, Any]:
        values = {f.name: getattr(self, f.name) for f in fields(self)}
        values.update(stream=self.stream.to_dict(), when_full=self.when_full.value,
                      columns=None if self.columns is None else list(self.columns))
        return values

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> LinkSpec:
        values = dict(data)
        values.update(stream=StreamInfo.from_dict(data["stream"]), when_full=WhenFull(data["when_full"]),
                      columns=None if data.get("columns") is None else tuple(data["columns"]))
        return cls(**values)


@dataclass(frozen=True, kw_only=True)
class WorkerSpec:
    """Everything one worker needs: its block (type, parameters, placeholders), where it lives, its
    links by port, and the supervisor's control and statistics sockets.

    >>> spec = WorkerSpec(name="keep", type_name="discard", params={"rate_limit": 0.0}, flow_path="f.toml",
    ...                   output_dir=".", control="ipc:///tmp/c", stats="ipc:///tmp/s")
    >>> WorkerSpec.from_json(spec.to_json()) == spec
    True
    """

    name: str
    type_name: str
    params: dict[str, Any]
    flow_path: str
    output_dir: str
    control: str
    stats: str
    restart: int = 0                 # instances of this block before this one
    design_folder: str | None = None  # where the supervisor saved the banks it designed (see blocks._bank_params)
    placeholders: dict[str, Any] = field(default_factory=dict)
    inputs: dict[str, LinkSpec] = field(default_factory=dict)
    outputs: dict[str, list[LinkSpec]] = field(default_factory=dict)

    def to_dict(self) -> dict[str, Any]:
        values = {f.name: getattr(self, f.name) for f in fields(self)}
        values.update(inputs={port: spec.to_dict() for port, spec in self.inputs.items()},
                      outputs={port: [spec.to_dict() for spec in specs] for port, specs in self.outputs.items()})
        return values

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> WorkerSpec:
        values = dict(data)
        values.update(inputs={port: LinkSpec.from_dict(d) for port, d in values["inputs"].items()},
                      outputs={port: [LinkSpec.from_dict(d) for d in ds] for port, ds in values["outputs"].items()})
        return cls(**values)

    def to_json(self) -> str:
        return json.dumps(self.to_dict())

    @classmethod
    def from_json(cls, text: str) -> WorkerSpec:
        return cls.from_dict(json.loads(text))


def specs_to_json(specs: list[WorkerSpec]) -> str:
    """The spec file of one worker process: one block's spec, or a list of them for copies of a per-channel
    block that share a process (``copies_per_process``)."""
    return specs[0].to_json() if len(specs) == 1 else json.dumps([spec.to_dict() for spec in specs])


def specs_from_json(text: str) -> list[WorkerSpec]:
    """The blocks of one worker process, from what :func:`specs_to_json` wrote."""
    data = json.loads(text)
    return [WorkerSpec.from_dict(item) for item in data] if isinstance(data, list) else [WorkerSpec.from_dict(data)]
