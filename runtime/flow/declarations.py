"""Reading a flow's tables: ``[flow]``, ``[blocks.NAME]`` and ``[[links]]``, each checked on its own.

What comes out is declarations (a block type with converted parameters, and
its per-channel rule) and raw links (two port references or an endpoint,
their selection and options); nothing here knows about streams yet. Link
options are declared in :data:`LINK_OPTIONS` like block parameters and
converted by the same code.
"""

from __future__ import annotations

import ipaddress
import re
import string
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from bandloom.blocks.block import Block, Param, toml_repr
from bandloom.blocks.params import path_problem, shortened

from ..keys import key_folder_problem
from ..plugins import RESERVED_KEYS, Registry
from .hosts import check_placement, read_hosts
from .model import FailurePolicy, Host, LinkOptions, OnFailure, WhenFull
from .problems import KeyPath, ProblemLog, did_you_mean, format_key_path, known_names

__all__ = ["BLOCK_OPTIONS", "Declaration", "FLOW_KEYS", "FLOW_OPTIONS", "LINK_KEYS", "LINK_OPTIONS", "PER_CHANNEL_KEYS",
           "PLACEHOLDERS", "RawLink", "TOP_LEVEL_KEYS", "parse_port_ref", "read_tables"]

TOP_LEVEL_KEYS = ("flow", "hosts", "blocks", "links")
#: The keys of the [flow] table, declared like block parameters.
FLOW_OPTIONS: tuple[Param, ...] = (
    Param("name", "str", "the flow's name in summaries", default=None),
    Param("description", "str", "what the flow is for", default=""),
    Param("accept_loss", "bool", "a run that loses samples still exits 0 (the verdict still counts them)",
          default=False),
    Param("max_processes", "int", "the most block processes the flow may start (default: one per 128 MiB of "
          "this machine's memory, at least 16 and at most 1000)", default=None, minimum=1, maximum=100_000),
    Param("keys", "str", "with [hosts.NAME]: the folder made by 'bandloom keys' that every host holds a copy of; "
          "links between hosts are encrypted and authenticated with it", default=None,
          rule="a folder made by 'bandloom keys', relative to the flow file"),
    Param("insecure", "bool", "with [hosts.NAME]: links between hosts go in the clear, unauthenticated", default=False),
    Param("shared_memory", "bool", "links between blocks on one machine pass their samples through shared memory "
          "(false: through their sockets, copied by the kernel)", default=True),
)
FLOW_KEYS = tuple(p.name for p in FLOW_OPTIONS)
PER_CHANNEL_KEYS = ("from", "select", "input", "tolerance")
NAME_PATTERN = re.compile(r"[A-Za-z][A-Za-z0-9_-]{0,63}\Z")
PLACEHOLDERS = ("channel", "frequency", "frequency_mhz")
#: A placeholder's format specification: Python's mini-language without nested fields, widths bounded.
_PLAIN_SPEC = re.compile(r"(?:[^{}]?[<>=^])?[+\- ]?z?#?0?(\d*)[_,]?(?:\.(\d+))?[bcdeEfFgGnosxX%]?\Z")
MAX_WIDTH = 32


def _too_wide(spec: str) -> bool:
    m = _PLAIN_SPEC.match(spec)
    return m is not None and any(int(g) > MAX_WIDTH for g in m.groups() if g)


TOLERANCE = Param("tolerance", "quantity", "how far a frequency in 'select' may be from a channel centre "
                  "(default 5 % of the spacing)", default=None, unit="Hz", minimum=0, rule="a frequency >= 0")

#: What the runtime does when a block's process fails: keys of any [blocks.NAME] table, beside its
#: parameters; they become a FailurePolicy.
FAILURE_OPTIONS: tuple[Param, ...] = (
    Param("on_failure", "choice", "what the run does when this block fails or dies", default="stop",
          choices=tuple(o.value for o in OnFailure),
          rule="'stop' (the run fails), 'restart' (a new process takes over; what it missed is a counted gap) "
               "or 'continue' (the block stays down, the rest runs on)"),
    Param("restarts", "int", "with on_failure = \"restart\": how many times at most", default=3, minimum=1,
          maximum=1000, rule="a whole number of restarts from 1 to 1000"),
    Param("restart_delay", "quantity", "with on_failure = \"restart\": the wait before the first restart, "
          "doubled for each one after", default=1.0, unit="s", minimum=0.0, maximum=3600.0,
          rule="a duration from 0 s to 3600 s"),
)
#: How many copies of a per-channel block share one process.
COPIES_PER_PROCESS = Param(
    "copies_per_process", "int", "for a per-channel block: how many of its copies run in one process (each "
    "keeps its own links, counters and failure; a crash of the process takes all of them)", default=1,
    minimum=1, maximum=4096, rule="a whole number from 1 to 4096")
#: Runtime keys of any [blocks.NAME] table, beside its parameters.
BLOCK_OPTIONS: tuple[Param, ...] = FAILURE_OPTIONS + (COPIES_PER_PROCESS,)
BLOCK_OPTION_KEYS = tuple(p.name for p in BLOCK_OPTIONS)

#: The options of a link, converted like block parameters; each becomes a field of LinkOptions.
LINK_OPTIONS: tuple[Param, ...] = (
    Param("queue", "int", "messages held at each end of the link", default=8, minimum=1, maximum=100000,
          rule="a whole number of messages from 1 to 100000"),
    Param("when_full", "choice", "what a full link does", default="wait", choices=tuple(w.value for w in WhenFull),
          rule="'wait' (lossless, slows the producer) or 'drop' (counted, flagged drops)"),
    Param("latency", "quantity", "how long rows may wait in the sender to fill a fuller message (up to 256 KiB): "
          "fewer, larger messages for narrow channels; 0 sends each chunk as the block made it (endpoints always "
          "do)", default=0.05, unit="s", minimum=0.0, maximum=10.0, rule="a duration from 0 s to 10 s"),
    Param("insecure", "bool", "send an endpoint reachable from other machines in the clear", default=False),
    Param("keys", "str", "folder made by 'bandloom keys' (endpoints)", default=None,
          rule="a folder made by 'bandloom keys' holding server.key_secret"),
    TOLERANCE,
)
#: The keys that say what a link joins.
LINK_ENDS = ("from", "to", "endpoint", "select")
LINK_KEYS = LINK_ENDS + tuple(p.name for p in LINK_OPTIONS)


def _no_file(path: Path) -> bool:
    """True when ``path`` is one the OS takes and nothing is there (a path it refuses, or one this user
    cannot look at, is for the key-folder check to report)."""
    if path_problem(str(path)):
        return False
    try:
        return not path.is_file()
    except OSError:
        return False


@dataclass(frozen=True, kw_only=True)
class Declaration:
    """One ``[blocks.NAME]`` table, read: its type, its converted parameters, its per-channel rule."""

    name: str
    cls: type[Block]
    params: dict[str, Any]
    per_channel: dict[str, Any] | None
    policy: FailurePolicy
    ok: bool                                                          # declared without problems
    host: str | None = None                                           # [hosts.NAME] it runs on
    copies_per_process: int = 1                                       # per-channel copies sharing a process
    feeds: list[tuple[int | str, str]] = field(default_factory=list)  # (links index or "per_channel", port)


@dataclass(frozen=True, kw_only=True)
class RawLink:
    """One ``[[links]]`` table, read: the ends it names, its selection and its options."""

    index: int
    source: str
    source_port: str
    target: str | None
    target_port: str | None
    endpoint: str | None
    select: Any
    options: LinkOptions


def parse_port_ref(text: object) -> tuple[str, str] | None:
    """``"block.port"`` as (block, port), or None when it is not written so."""
    if not isinstance(text, str) or text.count(".") != 1:
        return None
    block, port = text.split(".")
    return (block, port) if block and port else None


def endpoints_clash(one: str, other: str) -> bool:
    """Whether two valid endpoints would bind the same place: the same ipc path, or the same tcp port on
    the same host or on a wildcard host (which takes the port on every address)."""
    if one.startswith("ipc://") or other.startswith("ipc://"):
        return one == other
    (host_a, _, port_a), (host_b, _, port_b) = (e[len("tcp://"):].rpartition(":") for e in (one, other))
    wildcard = {"*", "0.0.0.0", "::"}
    return port_a == port_b and (host_a.strip("[]") == host_b.strip("[]") or
                                 bool({host_a.strip("[]"), host_b.strip("[]")} & wildcard))


def endpoint_problem(text: str) -> tuple[str | None, bool]:
    """(what is wrong with an endpoint or None, whether only this machine can reach it)."""
    if not text.isprintable():
        return f"endpoint {toml_repr(text)} has a control character in it", False
    m = re.match(r"tcp://(\[[^\]]+\]|[^:/\[\]]+):(\d{1,5})\Z", text)
    if m:
        host = m.group(1).strip("[]")
        port = int(m.group(2))
        if not 1 <= port <= 65535:
            return f"port {port} is outside 1 .. 65535", False
        if host == "localhost":
            return None, True
        if host == "*":
            return None, False
        try:
            return None, ipaddress.ip_address(host).is_loopback
        except ValueError:
            return None, False
    m = re.match(r"ipc://(.+)\Z", text, re.DOTALL)
    if m:
        if m.group(1).startswith("@"):
            return ("an abstract socket (ipc://@NAME) can be opened by every local user; use an ipc path "
                    "(a folder only you can enter) or tcp with keys"), False
        if len(m.group(1).encode()) > 100:
            return "ipc paths are limited to about 100 bytes; use a shorter path", True
        return None, True
    return (f"expected 'tcp://HOST:PORT' (for example 'tcp://127.0.0.1:5601') or 'ipc://PATH', "
            f"got {toml_repr(text)}"), False


def convert_option(log: ProblemLog, at: KeyPath, param: Param, table: dict[str, Any]) -> tuple[bool, Any]:
    """(ok, value) of option ``param`` in ``table``: its default when absent; a problem when wrong."""
    if param.name not in table:
        return True, param.default
    try:
        return True, param.convert(table[param.name])
    except ValueError as error:
        log.add(at + (param.name,), str(error))
        return False, None


class _TableReader:
    def __init__(self, log: ProblemLog, registry: Registry, flow_dir: Path) -> None:
        self.log = log
        self.registry = registry
        self.flow_dir = flow_dir
        self.claimed: set[tuple[str, str | None]] = set()    # (block, input port) a link names, valid or not
        self.endpoints: list[tuple[str, KeyPath]] = []      # each endpoint bound so far, and where

    # -- [blocks.NAME] ---------------------------------------------------------------------
    def declaration(self, name: str, table: Any) -> Declaration | None:
        before = len(self.log)
        read = self._declaration(name, table)
        if read is None:
            return None
        cls, params, per_channel = read
        policy = self.failure_policy(name, cls, table)
        copies = self.copies_per_process(name, table, per_channel, policy)
        host = table.get("host")
        return Declaration(name=name, cls=cls, params=params, per_channel=per_channel, policy=policy,
                           ok=len(self.log) == before, host=host if isinstance(host, str) else None,
                           copies_per_process=copies)

    def copies_per_process(self, name: str, table: dict[str, Any], per_channel: dict[str, Any] | None,
                           policy: FailurePolicy) -> int:
        at: KeyPath = ("blocks", name, COPIES_PER_PROCESS.name)
        good, copies = convert_option(self.log, ("blocks", name), COPIES_PER_PROCESS, table)
        if not good or COPIES_PER_PROCESS.name not in table:
            return 1
        if per_channel is None:
            self.log.add(at, "copies_per_process applies to a per-channel block (per_channel = { from = ... }); "
                         "this block is one process")
            return 1
        if copies > 1 and policy.on_failure is OnFailure.RESTART:
            self.log.add(at, "copies that share a process cannot be restarted one by one; use on_failure = "
                         "\"continue\" or \"stop\", or copies_per_process = 1")
            return 1
        return int(copies)

    def failure_policy(self, name: str, cls: type[Block], table: dict[str, Any]) -> FailurePolicy:
        at: KeyPath = ("blocks", name)
        values: dict[str, Any] = {}
        for param in FAILURE_OPTIONS:
            good, values[param.name] = convert_option(self.log, at, param, table)
            if not good:
                return FailurePolicy()
        policy = FailurePolicy(on_failure=OnFailure(values["on_failure"]), restarts=values["restarts"],
                               restart_delay=values["restart_delay"])
        if policy.on_failure is not OnFailure.STOP and cls.is_source:
            self.log.add(at + ("on_failure",), f"{cls.type_name} is a source: when it fails its streams end, so "
                         f"the run stops; on_failure applies to blocks with inputs")
        elif policy.on_failure is OnFailure.RESTART and not cls.restartable:
            kinds = known_names(sorted(t for t, c in self.registry.types.items() if c.restartable))
            self.log.add(at + ("on_failure",), f"{cls.type_name} cannot be restarted part way through a stream; "
                         f"use 'continue' or 'stop' (restartable types: {kinds})")
        if policy.on_failure is not OnFailure.RESTART:
            for key in ("restarts", "restart_delay"):
                if key in table:
                    self.log.add(at + (key,), f"{key} applies only with on_failure = \"restart\"")
        return policy

    def _declaration(self, name: str, table: Any) -> tuple[type[Block], dict, dict | None] | None:
        log = self.log
        if not NAME_PATTERN.match(name):
            log.add(("blocks", name), "block names start with a letter and use letters, digits, '-' and '_' (at most 64)")
            return None
        if not isinstance(table, dict):
            log.add(("blocks", name), f"expected a table [blocks.{name}] with a type, got {toml_repr(table)}")
            return None
        type_name = table.get("type")
        if type_name is not None and not isinstance(type_name, str):
            log.add(("blocks", name, "type"), f"expected a block type as a quoted string, got {toml_repr(type_name)}")
            return None
        if type_name is None:
            log.add(("blocks", name), f"missing 'type'; block types: {known_names(self.registry.types)}")
            return None
        cls = self.registry.types.get(type_name)
        if cls is None:
            log.add(("blocks", name, "type"), f"unknown block type {shortened(type_name)!r}"
                    f"{did_you_mean(type_name, self.registry.types)}; 'bandloom blocks' lists the types")
            return None
        params: dict[str, Any] = {}
        declared = {p.name: p for p in cls.parameters}
        for key, value in table.items():
            if key in RESERVED_KEYS:
                continue
            param = declared.get(key)
            if param is None:
                log.add(("blocks", name, key), f"{type_name} has no parameter {key!r}"
                        f"{did_you_mean(key, declared)}; its parameters: {known_names(declared)}")
                continue
            try:
                params[key] = param.convert(value)
            except ValueError as error:
                log.add(("blocks", name, key), str(error))
        for param in cls.parameters:
            if param.name not in params and param.name not in table:
                if param.required:
                    log.add(("blocks", name), f"missing required parameter {param.name!r} "
                            f"({param.describe_type()}: {param.doc})")
                else:
                    params[param.name] = param.default
        per_channel = self.per_channel(name, table.get("per_channel"))
        for p in cls.parameters:
            if p.kind == "output-path" and isinstance(params.get(p.name), str):
                self.placeholders(name, p.name, params[p.name], per_channel is not None)
        return cls, params, per_channel

    def per_channel(self, name: str, rule: Any) -> dict[str, Any] | None:
        if rule is None:
            return None
        at: KeyPath = ("blocks", name, "per_channel")
        if not isinstance(rule, dict):
            self.log.add(at, "expected an inline table such as { from = \"split.channels\", select = \"0..7\" }")
            return None
        for key in rule:
            if key not in PER_CHANNEL_KEYS:
                self.log.add(at, f"unknown key {key!r}; expected "
                             f"{known_names(PER_CHANNEL_KEYS)}{did_you_mean(key, PER_CHANNEL_KEYS)}")
        if "from" not in rule:
            self.log.add(at, "missing 'from' (for example \"split.channels\")")
            return None
        return rule

    def placeholders(self, name: str, key: str, text: str, per_channel: bool) -> None:
        allowed = PLACEHOLDERS if per_channel else ()
        at: KeyPath = ("blocks", name, key)
        try:
            parsed = [(f, spec, conversion) for _, f, spec, conversion in string.Formatter().parse(text)
                      if f is not None]
        except ValueError as error:
            self.log.add(at, f"bad placeholder in {toml_repr(text)}: {error}")
            return
        for f, spec, conversion in parsed:
            if conversion or not _PLAIN_SPEC.match(spec or "") or _too_wide(spec or ""):
                self.log.add(at, f"placeholder {{{f}{'!' + conversion if conversion else ''}:{spec}}}: only a plain "
                             f"format is allowed after the name (fill, align, sign, width up to {MAX_WIDTH}, precision "
                             f"up to {MAX_WIDTH}, type), as in {{channel:02d}} or {{frequency_mhz:.4f}}")
                continue
        fields = [f for f, _, _ in parsed]
        for f in fields:
            if f in allowed:
                continue
            if f in PLACEHOLDERS:
                self.log.add(at, f"{{{f}}} is only known in per-channel blocks "
                             f"(add per_channel = {{ from = ..., select = ... }})")
            else:
                self.log.add(at, f"unknown placeholder {{{f}}}; known: "
                             f"{', '.join('{' + p + '}' for p in PLACEHOLDERS)}{did_you_mean(f, PLACEHOLDERS)}")

    # -- [[links]] ---------------------------------------------------------------------------
    def link(self, i: int, table: Any, decls: dict[str, Declaration], declared_names: set[str]) -> RawLink | None:
        log = self.log
        at: KeyPath = ("links", i)
        if not isinstance(table, dict):
            log.add(at, "expected a table with 'from' and 'to'")
            return None
        for key in table:
            if key not in LINK_KEYS:
                log.add(at + (key,), f"unknown key; links take {known_names(LINK_KEYS)}{did_you_mean(key, LINK_KEYS)}")
        ok = True
        source = self.port_ref(at + ("from",), table.get("from"), decls, declared_names, "output")
        target = None
        endpoint = None
        if "to" in table and "endpoint" in table:
            log.add(at, "give 'to' (a block input) or 'endpoint' (for an outside program), not both")
            ok = False
        elif "endpoint" in table:
            endpoint = table["endpoint"]
            ok = self.endpoint(at, endpoint, table)
        else:
            target = self.port_ref(at + ("to",), table.get("to"), decls, declared_names, "input")
            named = parse_port_ref(table.get("to"))
            if target:
                self.claimed.add(target)
            elif named and named[0] in decls:
                self.claimed.add((named[0], None))            # a broken link meant to feed it
            if target and decls.get(target[0]) and decls[target[0]].per_channel is not None:
                log.add(at + ("to",), f"{target[0]} is per-channel; it is fed by its per_channel rule, not by links")
                target = None
        if source is None or (target is None and endpoint is None):
            ok = False
        values: dict[str, Any] = {}
        for param in LINK_OPTIONS:
            good, values[param.name] = convert_option(log, at, param, table)
            if param.name == "keys" and good and values["keys"] is not None:
                good, values["keys"] = self.keys_folder(at, param, values["keys"], endpoint)
            ok = ok and (good or param is TOLERANCE)    # a bad tolerance is reported, the link still made
        if values.get("insecure") and endpoint is None:
            log.add(at + ("insecure",), "insecure applies to links with an endpoint; a link between blocks never "
                    "leaves this machine's private sockets")
            ok = False
        elif values.get("insecure") and values.get("keys"):
            log.add(at + ("insecure",), "give keys (encrypted) or insecure = true (in the clear), not both")
            ok = False
        if not ok or source is None:
            return None
        values["when_full"] = WhenFull(values["when_full"])
        return RawLink(index=i, source=source[0], source_port=source[1],
                       target=target[0] if target else None, target_port=target[1] if target else None,
                       endpoint=endpoint, select=table.get("select"), options=LinkOptions(**values))

    def keys_folder(self, at: KeyPath, param: Param, keys: str, endpoint: str | None) -> tuple[bool, str | None]:
        folder = self.flow_dir / keys
        problem = key_folder_problem(folder)
        if problem and _no_file(folder / "server.key_secret"):
            self.log.add(at + ("keys",), f"expected {param.rule}, got {toml_repr(keys)}")
            return False, None
        if problem:
            self.log.add(at + ("keys",), problem)
            return False, None
        if endpoint is None:
            self.log.add(at + ("keys",), "keys apply to links with an endpoint")
            return False, None
        return True, str(folder)

    def endpoint(self, at: KeyPath, endpoint: Any, table: dict[str, Any]) -> bool:
        if not isinstance(endpoint, str):
            self.log.add(at + ("endpoint",), f"expected text such as 'tcp://127.0.0.1:5601', got {toml_repr(endpoint)}")
            return False
        message, loopback = endpoint_problem(endpoint)
        if message:
            self.log.add(at + ("endpoint",), message)
            return False
        for other, where in self.endpoints:
            if endpoints_clash(endpoint, other):
                self.log.add(at + ("endpoint",), f"{endpoint} takes the place {format_key_path(where)} binds "
                             f"({other}); each endpoint serves one link: choose another port or path")
                return False
        self.endpoints.append((endpoint, at))
        if not loopback and not table.get("insecure") and not table.get("keys"):
            self.log.add(at + ("endpoint",), f"{endpoint} is reachable from other machines: give "
                         f"keys = \"FOLDER\" (see 'bandloom keys') to encrypt and authenticate it, or "
                         f"insecure = true to send it in the clear")
            return False
        return True

    def port_ref(self, at: KeyPath, text: Any, decls: dict[str, Declaration], declared_names: set[str],
                 direction: str) -> tuple[str, str] | None:
        if text is None:
            self.log.add(at[:-1], f"missing '{at[-1]}' (written \"block.port\")")
            return None
        ref = parse_port_ref(text)
        if ref is None:
            self.log.add(at, f"expected \"block.port\", got {toml_repr(text)}")
            return None
        block, port = ref
        decl = decls.get(block)
        if decl is None:
            if block not in declared_names:
                self.log.add(at, f"no block named {block!r}{did_you_mean(block, declared_names)}")
            return None
        ports = decl.cls.outputs if direction == "output" else decl.cls.inputs
        names = [p.name for p in ports]
        if port not in names:
            kind = "outputs" if direction == "output" else "inputs"
            self.log.add(at, f"{decl.cls.type_name} block {block!r} has no {direction} port {port!r}"
                         f"{did_you_mean(port, names)}; its {kind}: {known_names(names)}")
            return None
        return ref


@dataclass(frozen=True, kw_only=True)
class Tables:
    """What :func:`read_tables` read: the flow's own keys, its declarations and links, and which
    block inputs some link names (valid or not, so an input is not also called unconnected)."""

    meta: dict[str, Any]
    declarations: dict[str, Declaration]
    links: list[RawLink]
    claimed: set[tuple[str, str | None]]
    hosts: dict[str, Host] = field(default_factory=dict)
    host_keys: str | None = None


def read_tables(data: dict[str, Any], log: ProblemLog, registry: Registry, flow_dir: Path) -> Tables:
    """Read and check the parsed TOML's tables one by one; problems go to ``log``."""
    reader = _TableReader(log, registry, flow_dir)
    for key in data:
        if key not in TOP_LEVEL_KEYS:
            log.add((key,), f"unknown top-level table; expected one of {known_names(TOP_LEVEL_KEYS)}"
                    f"{did_you_mean(key, TOP_LEVEL_KEYS)}")
    meta = data.get("flow", {})
    if not isinstance(meta, dict):
        log.add(("flow",), "expected a table with name and description")
        meta = {}
    for key in meta:
        if key not in FLOW_KEYS:
            log.add(("flow", key), f"unknown key; expected one of {known_names(FLOW_KEYS)}{did_you_mean(key, FLOW_KEYS)}")
    options = {}
    for param in FLOW_OPTIONS:
        good, value = convert_option(log, ("flow",), param, meta)
        if good:
            options[param.name] = value
    blocks = data.get("blocks")
    if not isinstance(blocks, dict) or not blocks:
        log.add(("blocks",), "a flow needs at least one block: add a [blocks.NAME] table with a type")
        blocks = {}
    decls = {}
    for name, table in blocks.items():
        decl = reader.declaration(name, table)
        if decl:
            decls[name] = decl
    raw_links = data.get("links", [])
    if not isinstance(raw_links, list):
        log.add(("links",), "expected an array of tables, written [[links]]")
        raw_links = []
    links = []
    for i, table in enumerate(raw_links):
        link = reader.link(i, table, decls, set(blocks))
        if link:
            links.append(link)
    hosts = read_hosts(data.get("hosts"), log)
    placed = {name: table.get("host") for name, table in blocks.items() if isinstance(table, dict)}
    declared_hosts = set(data["hosts"]) if isinstance(data.get("hosts"), dict) else set()
    host_keys = check_placement(log, hosts, declared_hosts, placed, options, flow_dir)
    return Tables(meta=options, declarations=decls, links=links, claimed=reader.claimed, hosts=hosts,
                  host_keys=host_keys)
