"""Checking a whole flow: from a file (``load_flow``) or from a mapping made in code (``check_flow``)."""

from __future__ import annotations

import tomllib
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

from ..plugins import Registry
from .declarations import read_tables
from .expansion import check_inputs, default_process_limit, expand, wiring_order
from .hosts import check_host_ports
from .locator import KeyLocator
from .model import Flow, Instance, Link, OnFailure
from .output_paths import check_output_paths
from .overrides import Override, apply_overrides, attribute_to_overrides
from .problems import FlowErrors, Problem, ProblemLog, syntax_problem
from .text_checks import MAX_FLOW_BYTES, decode_flow

__all__ = ["check_flow", "load_flow"]


def check_flow(mapping: Mapping[str, Any], registry: Registry, *, path: str | Path, text: str = "",
               output_dir: str | Path | None = None) -> Flow:
    """Check a flow given as the mapping tomllib would make of it; return a Flow or raise FlowErrors.

    ``path`` names the flow in messages and is where relative input paths and
    key folders start from; ``text``, when given, is the TOML the mapping came
    from, so that problems carry line numbers.
    """
    path = Path(path)
    log = ProblemLog(path, KeyLocator(text).find)
    tables = read_tables(dict(mapping), log, registry, path.parent)
    decls, links = tables.declarations, tables.links
    limit = tables.meta.get("max_processes") or default_process_limit()
    if len(decls) > limit:
        log.add(("flow",), f"the flow declares {len(decls)} block processes; the limit is {limit} ([flow] "
                f"max_processes, sized for this machine) — raise it if this machine can carry them")
        raise FlowErrors(log.problems)
    order = wiring_order(log, decls, links)
    check_inputs(log, decls, links, tables.claimed)
    instances: dict[str, Instance] = {}
    expanded: list[Link] = []
    if order is not None:
        # streams are worked out for every block that was declared well, so that their
        # problems are reported along with the others
        out = Path(output_dir) if output_dir else Path.cwd()
        instances, expanded = expand(log, decls, links, order, flow_path=path, output_dir=out, max_processes=limit)
        check_output_paths(log, instances, flow_path=path, output_dir=out)
        if tables.hosts and not log.problems:      # (a block on an unknown host has no ports)
            check_host_ports(log, tables.hosts, instances, expanded)
    continuing = {i.declared: i for i in instances.values() if i.policy.on_failure is OnFailure.CONTINUE
                  and any(link.target for links in i.outputs.values() for link in links)}
    for declared, inst in continuing.items():
        consumers = sorted({link.target for links in inst.outputs.values() for link in links if link.target})
        log.add(("blocks", declared, "on_failure"), f"{inst.name} feeds {', '.join(consumers)}, which would wait for "
                f"its stream for ever if it stayed down; use 'restart', or 'continue' on blocks that feed no block")
    for attribute, what in (("uses_stdin", "read standard input"), ("uses_stdout", "write standard output")):
        users = [i for i in instances.values() if getattr(i.cls, attribute)]
        if len(users) > 1:
            log.add(("blocks", users[1].declared), f"{len(users)} blocks ({', '.join(i.name for i in users)}) "
                    f"{what}; a run has one, so only one block may")
    if log.problems:
        raise FlowErrors(log.problems)
    return Flow(path=path, name=tables.meta.get("name") or path.stem, description=tables.meta.get("description", ""),
                accept_loss=bool(tables.meta.get("accept_loss")),
                shared_memory=bool(tables.meta.get("shared_memory", True)),
                instances=instances, links=expanded, hosts=tables.hosts, host_keys=tables.host_keys,
                hosts_insecure=bool(tables.hosts and tables.meta.get("insecure")))


def load_flow(path: str | Path, registry: Registry, *, output_dir: str | Path | None = None,
              overrides: Sequence[Override] = ()) -> Flow:
    """Parse and check a flow file, with command-line ``overrides`` put in (:mod:`.overrides`); return a
    Flow or raise FlowErrors with every problem."""
    path = Path(path)
    try:
        with open(path, "rb") as handle:
            raw = handle.read(MAX_FLOW_BYTES + 1)
    except OSError as error:
        raise FlowErrors([Problem(str(path), "", f"cannot read the flow file: {error.strerror}")]) from None
    text, problems = decode_flow(str(path), raw)
    if text is None or problems:
        raise FlowErrors(problems)
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as error:
        raise FlowErrors([syntax_problem(path, error)]) from None
    apply_overrides(data, list(overrides), registry, path)
    try:
        return check_flow(data, registry, path=path, text=text, output_dir=output_dir)
    except FlowErrors as errors:
        raise attribute_to_overrides(errors, list(overrides)) from None
