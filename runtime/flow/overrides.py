"""Command-line overrides of a flow's values: ``--set BLOCK.KEY=VALUE`` (or ``--set flow.KEY=VALUE``).

VALUE is read as a TOML value when it is one (``8``, ``true``, ``"x"``,
``[1, 2]``, ``{ from = "split.channels", select = 3 }``) and as text otherwise
(``capture.cu8``, ``10 MHz``), then checked exactly as if the flow file held
it; a problem with it names the override, not a line of the file. A file a
block reads, given on the command line, is relative to the current folder
(as a shell user expects), not to the flow file's; files a block writes stay
relative to the output folder.
"""

from __future__ import annotations

import tomllib
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from ..plugins import Registry
from .problems import FlowErrors, Problem, printable
from .text_checks import check_text

__all__ = ["Override", "apply_overrides", "attribute_to_overrides", "parse_override"]


@dataclass(frozen=True)
class Override:
    """One ``--set``: as written, the table it changes (``("blocks", NAME)`` or ``("flow",)``), the key,
    the value."""

    text: str
    table: tuple[str, ...]
    key: str
    value: Any

    @property
    def where(self) -> str:
        return ".".join(self.table + (self.key,))


def parse_override(text: str) -> Override:
    """``NAME.KEY=VALUE`` as an Override; ValueError saying what would be right."""
    target, equals, raw = text.partition("=")
    shown = printable(text, 120)
    if not equals or "." not in target:
        raise ValueError(f"--set {shown}: expected BLOCK.KEY=VALUE (for example --set 'rx.sample_rate=10 MHz') "
                         f"or flow.KEY=VALUE")
    name, _, key = target.strip().partition(".")
    if not name or not key or "." in key:
        raise ValueError(f"--set {shown}: expected BLOCK.KEY=VALUE with one block name and one key")
    raw = raw.strip()
    lexical = check_text("--set", f"value = {raw}")       # the flow file's own limits: digits, nesting
    if lexical:
        raise ValueError(f"--set {shown}: {lexical[0].message}")
    try:
        value = tomllib.loads(f"value = {raw}")["value"] if raw else ""
    except (tomllib.TOMLDecodeError, RecursionError, ValueError):
        value = raw                    # plain text: a path, a quantity with its unit
    table = ("flow",) if name == "flow" else ("blocks", name)
    return Override(text, table, key, value)


def apply_overrides(data: dict[str, Any], overrides: list[Override], registry: Registry, path: Path) -> None:
    """Put each override into the parsed flow ``data``; FlowErrors naming the overrides that name nothing."""
    problems = []
    for override in overrides:
        if override.table == ("flow",):
            data.setdefault("flow", {})
            if isinstance(data["flow"], dict):
                data["flow"][override.key] = override.value
            continue
        blocks = data.get("blocks")
        table = blocks.get(override.table[1]) if isinstance(blocks, dict) else None
        if not isinstance(table, dict):
            known = ", ".join(sorted(blocks)) if isinstance(blocks, dict) else "none"
            problems.append(Problem(f"--set {printable(override.text, 120)}", "",
                                    f"the flow {path} has no block {override.table[1]!r} (its blocks: {known})"))
            continue
        value = override.value
        type_name = table.get("type")
        cls = registry.types.get(type_name) if isinstance(type_name, str) else None
        param = next((p for p in cls.parameters if p.name == override.key), None) if cls else None
        if param is not None and param.kind == "input-path" and isinstance(value, str) and value:
            value = str(Path(value).expanduser().absolute())      # relative to the current folder
        table[override.key] = value
    if problems:
        raise FlowErrors(problems)


def attribute_to_overrides(errors: FlowErrors, overrides: list[Override]) -> FlowErrors:
    """The same problems, those about an overridden value naming its ``--set`` instead of a file line."""
    by_where = {o.where: o for o in overrides}
    problems = []
    for p in errors.problems:
        override = by_where.get(p.where)
        if override is not None:
            p = Problem(f"--set {printable(override.text, 120)}", p.where, p.message)
        problems.append(p)
    return FlowErrors(problems)
