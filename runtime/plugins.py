"""Block types from installed packages, found through the ``bandloom.blocks`` entry-point group.

bandloom's own blocks are registered the same way (see pyproject.toml), so
there is one mechanism. Names listed in the environment variable
``BANDLOOM_BLOCKED_PLUGINS`` (comma-separated entry-point names) are not
loaded at all. A plugin that fails to import, or whose class breaks the block
contract, is reported by name and distribution and left out; the others load.
The contract is checked when the plugin registers, not when it is first used.
"""

from __future__ import annotations

import os
from collections.abc import Collection
from dataclasses import dataclass, field
from importlib.metadata import entry_points

from bandloom.blocks.block import Block, Param, Port
from bandloom.blocks.params import KINDS

__all__ = ["ENTRY_POINT_GROUP", "PluginError", "RESERVED_KEYS", "Registry", "load_registry", "validate_block_class"]

ENTRY_POINT_GROUP = "bandloom.blocks"
PARAM_KINDS = frozenset(KINDS)          # the rows of the kinds table
PORT_KINDS = {"samples", "channels", "any"}


#: Keys of a [blocks.NAME] table that belong to the runtime, not to the block type (the block options
#: are declared in flow.declarations.BLOCK_OPTIONS; a test holds the two lists together).
RESERVED_KEYS = ("type", "per_channel", "on_failure", "restarts", "restart_delay", "copies_per_process", "host")


class PluginError(Exception):
    """A plugin broke the block contract; the message names what."""


@dataclass
class Registry:
    """The block types found: by type name, the class and the distribution that provides it."""

    types: dict[str, type[Block]] = field(default_factory=dict)
    origins: dict[str, str] = field(default_factory=dict)
    failures: list[str] = field(default_factory=list)  # one line per plugin that did not load

    def names(self) -> list[str]:
        return sorted(self.types)


def validate_block_class(name: str, cls: object) -> None:
    """Raise PluginError unless ``cls`` is a proper block type registered as ``name``."""
    if not (isinstance(cls, type) and issubclass(cls, Block)):
        raise PluginError(f"{cls!r} is not a subclass of bandloom.blocks.block.Block")
    if cls.type_name != name:
        raise PluginError(f"its type_name is {cls.type_name!r} but it is registered as {name!r}")
    if not cls.summary:
        raise PluginError("it has no one-line summary")
    seen = set()
    for p in cls.parameters:
        if not isinstance(p, Param):
            raise PluginError(f"parameter {p!r} is not a Param")
        if p.kind not in PARAM_KINDS:
            raise PluginError(f"parameter {p.name!r} has unknown kind {p.kind!r}")
        if p.kind in ("int", "float", "quantity") and (p.minimum is None or p.maximum is None):
            raise PluginError(f"parameter {p.name!r} is a number without both bounds (minimum and maximum); "
                              f"every number a flow gives must be bounded before anything is allocated")
        if p.name in seen or p.name in RESERVED_KEYS:
            raise PluginError(f"parameter name {p.name!r} is repeated or reserved")
        seen.add(p.name)
    for direction, ports in (("input", cls.inputs), ("output", cls.outputs)):
        names = set()
        for port in ports:
            if not isinstance(port, Port) or port.kind not in PORT_KINDS:
                raise PluginError(f"{direction} port {port!r} is not a Port of kind {sorted(PORT_KINDS)}")
            if port.name in names:
                raise PluginError(f"{direction} port {port.name!r} is repeated")
            names.add(port.name)
    if cls.is_source and cls.inputs:
        raise PluginError("a source block cannot have inputs")
    if cls.length_parameter is not None and (not cls.is_source or cls.length_parameter not in seen):
        raise PluginError(f"length_parameter {cls.length_parameter!r} is not a parameter of this source block")


def load_registry(only: str | Collection[str] | None = None) -> Registry:
    """Load every block type (or just the one named ``only``, or those named in it: importing the others'
    modules is time a worker and the launcher need not spend); never raises for a bad plugin."""
    blocked = {n.strip() for n in os.environ.get("BANDLOOM_BLOCKED_PLUGINS", "").split(",") if n.strip()}
    wanted = None if only is None else {only} if isinstance(only, str) else set(only)
    registry = Registry()
    for ep in sorted(entry_points(group=ENTRY_POINT_GROUP), key=lambda e: e.name):
        if ep.name in blocked or (wanted is not None and ep.name not in wanted):
            continue
        dist = ep.dist.name if ep.dist is not None else "unknown distribution"
        try:
            cls = ep.load()
            validate_block_class(ep.name, cls)
        except Exception as error:  # a plugin may fail in any way; report it and go on
            registry.failures.append(f"plugin {ep.name!r} from {dist} failed to load: "
                                     f"{type(error).__name__}: {error}")
            continue
        if ep.name in registry.types:
            registry.failures.append(f"plugin {ep.name!r} from {dist} is ignored: {registry.origins[ep.name]} "
                                     f"already provides a block type of that name")
            continue
        registry.types[ep.name] = cls
        registry.origins[ep.name] = dist
    return registry
