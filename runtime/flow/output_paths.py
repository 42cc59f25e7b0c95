"""Where a flow's blocks write, checked before anything runs.

Every output path is rendered for each instance (its placeholders filled) and
must stay inside the run's output folder (:meth:`BlockContext.output_path`
says how); no two instances may write the same file (a per-channel block with
a fixed path, placeholders that round two channels to one name, two writers
given one path); and no block may write a file that a block of the flow reads.
"""

from __future__ import annotations

import os
from pathlib import Path

from bandloom.blocks.block import BlockContext, BlockError

from .model import Instance
from .problems import ProblemLog

__all__ = ["check_output_paths"]


def _shown(target: str, output_dir: Path) -> str:
    """A path inside the output folder as the flow wrote it (the same on every machine)."""
    return f"{os.path.relpath(target, os.path.realpath(output_dir))!r} in the output folder"


def check_output_paths(log: ProblemLog, instances: dict[str, Instance], *, flow_path: Path, output_dir: Path) -> None:
    writers: dict[str, tuple[str, str]] = {}        # resolved path -> (instance, parameter)
    readers: dict[str, tuple[str, str]] = {}
    for inst in instances.values():
        context = BlockContext(inst.name, flow_path, output_dir, inst.placeholders)
        for param in inst.cls.parameters:
            value = inst.params.get(param.name)
            if not isinstance(value, str) or not value:
                continue
            at = ("blocks", inst.declared, param.name)
            if param.kind == "input-path":
                readers.setdefault(os.path.realpath(context.input_path(value)), (inst.name, param.name))
                continue
            if param.kind != "output-path":
                continue
            try:
                target = os.path.realpath(context.output_path(value))
            except (BlockError, ValueError, KeyError, IndexError) as error:
                log.add(at, f"{inst.name}: {error}")
                continue
            if target in writers:
                other, other_param = writers[target]
                log.add(at, f"{inst.name} and {other} would both write {_shown(target, output_dir)}; give each its own file (for a "
                        f"per-channel block, put {{channel}} in the path)")
            else:
                writers[target] = (inst.name, param.name)
    for target, (name, written) in writers.items():
        if target in readers:
            reader, reader_param = readers[target]
            inst = instances[name]
            log.add(("blocks", inst.declared, written), f"{name} would write {_shown(target, output_dir)}, which {reader} reads "
                    f"({reader_param}); writing it would destroy the input")
