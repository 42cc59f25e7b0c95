"""Flow files: parse, validate (every problem at once), and expand into instances and links.

The format is specified in docs/flow-files.md. ``load_flow(path, registry)``
returns a :class:`Flow` or raises :class:`FlowErrors` carrying every
:class:`Problem` found. Syntax errors name file, line and column; meaning
errors name the key path (``blocks.split.channels``, ``links[2].select``),
with the line where the key can be found in the text, what was expected and
what was got, and a "did you mean" for unknown names.
"""

from __future__ import annotations

import difflib
import ipaddress
import re
import string
import tomllib
from dataclasses import dataclass, field
from pathlib import Path

from bandloom.blocks.block import BlockContext, BlockError, toml_repr
from bandloom.blocks.units import UnitError, format_frequency, parse_quantity

TOP_LEVEL_KEYS = ("flow", "blocks", "links")
FLOW_KEYS = ("name", "description")
LINK_KEYS = ("from", "to", "endpoint", "select", "tolerance", "queue", "when_full", "insecure", "keys")
PER_CHANNEL_KEYS = ("from", "select", "input", "tolerance")
NAME_PATTERN = re.compile(r"^[A-Za-z][A-Za-z0-9_-]*$")
PLACEHOLDERS = ("channel", "frequency", "frequency_mhz")
DEFAULT_QUEUE = 8
DEFAULT_TOLERANCE_FRACTION = 0.05


# --------------------------------------------------------------------------- problems

@dataclass(frozen=True)
class Problem:
    """One thing wrong with a flow file."""

    file: str
    where: str
    message: str
    line: int | None = None
    column: int | None = None

    def __str__(self):
        place = self.file
        if self.line:
            place += f":{self.line}"
            if self.column:
                place += f":{self.column}"
        return f"{place}: {self.where}: {self.message}" if self.where else f"{place}: {self.message}"


class FlowErrors(Exception):
    """Every problem found in a flow file."""

    def __init__(self, problems):
        self.problems = list(problems)
        super().__init__("\n".join(str(p) for p in self.problems))


def _did_you_mean(name, candidates):
    match = difflib.get_close_matches(str(name), [str(c) for c in candidates], n=1, cutoff=0.6)
    return f" (did you mean {match[0]!r}?)" if match else ""


def _known(candidates):
    return ", ".join(repr(c) for c in sorted(candidates)) if candidates else "none"


class _Locator:
    """Finds the line of a key path in the TOML text (parsed TOML keeps no positions)."""

    def __init__(self, text):
        self.lines = text.splitlines()

    @staticmethod
    def _header(line):
        m = re.match(r"^\s*(\[\[?)\s*([^\]]+?)\s*\]\]?\s*(#.*)?$", line)
        if not m:
            return None
        parts = [p.strip().strip('"').strip("'") for p in m.group(2).split(".")]
        return m.group(1) == "[[", tuple(parts)

    def find(self, path):
        path = tuple(path)
        if not path:
            return None
        # locate the table the key lives in
        if path[0] == "links" and len(path) >= 2 and isinstance(path[1], int):
            table, rest, occurrence = ("links",), path[2:], path[1]
        elif path[0] == "blocks" and len(path) >= 2:
            table, rest, occurrence = ("blocks", path[1]), path[2:], 0
        elif path[0] == "flow":
            table, rest, occurrence = ("flow",), path[1:], 0
        else:
            for i, line in enumerate(self.lines):
                h = self._header(line)
                if h and h[1][0] == path[0]:
                    return i + 1
            table, rest, occurrence = None, path, 0
        start = 0
        if table is not None:
            seen = -1
            start = None
            for i, line in enumerate(self.lines):
                h = self._header(line)
                if h and h[1] == table:
                    seen += 1
                    if seen == occurrence:
                        start = i
                        break
            if start is None:
                return None
            if not rest:
                return start + 1
        key = str(rest[0])
        for i in range(start + (1 if table is not None else 0), len(self.lines)):
            line = self.lines[i]
            if self._header(line) and table is not None:
                break
            if re.match(rf"^\s*[\"']?{re.escape(key)}[\"']?\s*=", line):
                return i + 1
        return start + 1 if table is not None else None


# --------------------------------------------------------------------------- result

@dataclass
class Link:
    """One link after expansion: a producer's output to a consumer's input or a fixed endpoint."""

    id: int
    where: str                       # key path of what declared it, for messages
    source: str                      # instance name
    source_port: str
    columns: list | None             # positions in the source stream's channels; None = as is
    target: str | None               # instance name (None when endpoint)
    target_port: str | None
    endpoint: str | None             # fixed endpoint for outside consumers
    stream: object = None            # StreamInfo carried
    queue: int = DEFAULT_QUEUE
    when_full: str = "wait"
    insecure: bool = False
    keys: str | None = None

    @property
    def label(self):
        sel = ""
        if self.columns is not None and self.stream is not None:
            chans = self.stream.channels
            sel = f"[{chans[0]}]" if len(chans) == 1 else f"[{len(chans)} channels]"
        to = f"{self.target}.{self.target_port}" if self.target else self.endpoint
        return f"{self.source}.{self.source_port}{sel} -> {to}"


@dataclass
class Instance:
    """One block process: a declared block, or one channel's copy of a per-channel block."""

    name: str
    declared: str
    type_name: str
    cls: type
    params: dict
    placeholders: dict = field(default_factory=dict)
    inputs: dict = field(default_factory=dict)        # port -> Link
    outputs: dict = field(default_factory=dict)       # port -> [Link]
    input_streams: dict = field(default_factory=dict)
    output_streams: dict = field(default_factory=dict)


@dataclass
class Flow:
    path: Path
    name: str
    description: str
    instances: dict                  # name -> Instance, in topological order
    links: list

    def sources(self):
        return [i for i in self.instances.values() if i.cls.is_source]


# --------------------------------------------------------------------------- declarations

@dataclass
class _Decl:
    name: str
    cls: type
    params: dict
    per_channel: dict | None
    ok: bool = True                                   # declared without problems
    feeds: list = field(default_factory=list)         # raw links into this block: (index, port)


@dataclass
class _RawLink:
    index: int
    source: str
    source_port: str
    target: str | None
    target_port: str | None
    endpoint: str | None
    select: object
    tolerance: float | None
    queue: int
    when_full: str
    insecure: bool
    keys: str | None


def _parse_ref(text):
    if not isinstance(text, str) or text.count(".") != 1:
        return None
    block, port = text.split(".")
    return (block, port) if block and port else None


def _check_endpoint(text):
    """Return (problem message or None, is_loopback)."""
    m = re.match(r"^tcp://(\[[^\]]+\]|[^:/\[\]]+):(\d{1,5})$", text)
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
    m = re.match(r"^ipc://(.+)$", text)
    if m:
        if len(m.group(1).encode()) > 100:
            return "ipc paths are limited to about 100 bytes; use a shorter path", True
        return None, True
    return (f"expected 'tcp://HOST:PORT' (for example 'tcp://127.0.0.1:5601') or 'ipc://PATH', "
            f"got {toml_repr(text)}"), False


class _Checker:
    def __init__(self, path, text, registry, output_dir):
        self.path = Path(path)
        self.text = text
        self.registry = registry
        self.output_dir = Path(output_dir) if output_dir else Path.cwd()
        self.locator = _Locator(text)
        self.problems = []
        self.claimed = set()         # (block, input port) named by some link, valid or not

    def problem(self, key_path, message):
        where = ""
        for part in key_path:
            where += f"[{part}]" if isinstance(part, int) else (f".{part}" if where else str(part))
        self.problems.append(Problem(str(self.path), where, message, self.locator.find(key_path)))

    # -- declarations ------------------------------------------------------------------------
    def declarations(self, data):
        for key in data:
            if key not in TOP_LEVEL_KEYS:
                self.problem((key,), f"unknown top-level table; expected one of {_known(TOP_LEVEL_KEYS)}"
                             f"{_did_you_mean(key, TOP_LEVEL_KEYS)}")
        meta = data.get("flow", {})
        if not isinstance(meta, dict):
            self.problem(("flow",), "expected a table with name and description")
            meta = {}
        for key, value in meta.items():
            if key not in FLOW_KEYS:
                self.problem(("flow", key), f"unknown key; expected one of {_known(FLOW_KEYS)}"
                             f"{_did_you_mean(key, FLOW_KEYS)}")
            elif not isinstance(value, str):
                self.problem(("flow", key), f"expected text, got {toml_repr(value)}")
        blocks = data.get("blocks")
        if not isinstance(blocks, dict) or not blocks:
            self.problem(("blocks",), "a flow needs at least one block: add a [blocks.NAME] table with a type")
            blocks = {}
        decls = {}
        for name, table in blocks.items():
            decl = self.declaration(name, table)
            if decl:
                decls[name] = decl
        raw_links = data.get("links", [])
        if not isinstance(raw_links, list):
            self.problem(("links",), "expected an array of tables, written [[links]]")
            raw_links = []
        links = []
        for i, table in enumerate(raw_links):
            link = self.link(i, table, decls, set(blocks))
            if link:
                links.append(link)
        return meta, decls, links

    def declaration(self, name, table):
        before = len(self.problems)
        decl = self._declaration(name, table)
        if decl is not None:
            decl.ok = len(self.problems) == before
        return decl

    def _declaration(self, name, table):
        if not NAME_PATTERN.match(name):
            self.problem(("blocks", name), "block names start with a letter and use letters, digits, '-' and '_'")
            return None
        if not isinstance(table, dict):
            self.problem(("blocks", name), f"expected a table [blocks.{name}] with a type, got {toml_repr(table)}")
            return None
        type_name = table.get("type")
        if type_name is None:
            self.problem(("blocks", name), f"missing 'type'; block types: {_known(self.registry.types)}")
            return None
        cls = self.registry.types.get(type_name)
        if cls is None:
            self.problem(("blocks", name, "type"), f"unknown block type {type_name!r}"
                         f"{_did_you_mean(type_name, self.registry.types)}; 'bandloom blocks' lists the types")
            return None
        params = {}
        declared = {p.name: p for p in cls.parameters}
        for key, value in table.items():
            if key in ("type", "per_channel"):
                continue
            param = declared.get(key)
            if param is None:
                self.problem(("blocks", name, key), f"{type_name} has no parameter {key!r}"
                             f"{_did_you_mean(key, declared)}; its parameters: {_known(declared)}")
                continue
            try:
                params[key] = param.convert(value)
            except ValueError as error:
                self.problem(("blocks", name, key), str(error))
        for param in cls.parameters:
            if param.name not in params and param.name not in table:
                if param.required:
                    self.problem(("blocks", name), f"missing required parameter {param.name!r} "
                                 f"({param.describe_type()}: {param.doc})")
                else:
                    params[param.name] = param.default
        per_channel = table.get("per_channel")
        if per_channel is not None:
            if not isinstance(per_channel, dict):
                self.problem(("blocks", name, "per_channel"),
                             "expected an inline table such as { from = \"split.channels\", select = \"0..7\" }")
                per_channel = None
            else:
                for key in per_channel:
                    if key not in PER_CHANNEL_KEYS:
                        self.problem(("blocks", name, "per_channel"), f"unknown key {key!r}; expected "
                                     f"{_known(PER_CHANNEL_KEYS)}{_did_you_mean(key, PER_CHANNEL_KEYS)}")
                if "from" not in per_channel:
                    self.problem(("blocks", name, "per_channel"), "missing 'from' (for example \"split.channels\")")
                    per_channel = None
        for p in cls.parameters:
            if p.kind == "output-path" and isinstance(params.get(p.name), str):
                self.placeholder_check(name, p.name, params[p.name], per_channel is not None)
        return _Decl(name, cls, params, per_channel)

    def placeholder_check(self, name, key, text, per_channel):
        allowed = PLACEHOLDERS if per_channel else ()
        try:
            fields = [f for _, f, _, _ in string.Formatter().parse(text) if f is not None]
        except ValueError as error:
            self.problem(("blocks", name, key), f"bad placeholder in {text!r}: {error}")
            return
        for f in fields:
            if f not in allowed:
                if f in PLACEHOLDERS:
                    self.problem(("blocks", name, key), f"{{{f}}} is only known in per-channel blocks "
                                 f"(add per_channel = {{ from = ..., select = ... }})")
                else:
                    self.problem(("blocks", name, key), f"unknown placeholder {{{f}}}; known: "
                                 f"{', '.join('{' + p + '}' for p in PLACEHOLDERS)}{_did_you_mean(f, PLACEHOLDERS)}")

    def link(self, i, table, decls, declared_names):
        at = ("links", i)
        if not isinstance(table, dict):
            self.problem(at, "expected a table with 'from' and 'to'")
            return None
        for key in table:
            if key not in LINK_KEYS:
                self.problem(at + (key,), f"unknown key; links take {_known(LINK_KEYS)}{_did_you_mean(key, LINK_KEYS)}")
        ok = True
        source = self.port_ref(at + ("from",), table.get("from"), decls, declared_names, "output")
        target = endpoint = None
        if "to" in table and "endpoint" in table:
            self.problem(at, "give 'to' (a block input) or 'endpoint' (for an outside program), not both")
            ok = False
        elif "endpoint" in table:
            endpoint = table["endpoint"]
            if not isinstance(endpoint, str):
                self.problem(at + ("endpoint",), f"expected text such as 'tcp://127.0.0.1:5601', got {toml_repr(endpoint)}")
                ok = False
            else:
                message, loopback = _check_endpoint(endpoint)
                if message:
                    self.problem(at + ("endpoint",), message)
                    ok = False
                elif not loopback and not table.get("insecure") and not table.get("keys"):
                    self.problem(at + ("endpoint",), f"{endpoint} is reachable from other machines: give "
                                 f"keys = \"FOLDER\" (see 'bandloom keys') to encrypt and authenticate it, or "
                                 f"insecure = true to send it in the clear")
                    ok = False
        else:
            target = self.port_ref(at + ("to",), table.get("to"), decls, declared_names, "input")
            if target:
                self.claimed.add(target)
            elif _parse_ref(table.get("to")) and _parse_ref(table["to"])[0] in decls:
                self.claimed.add((_parse_ref(table["to"])[0], None))   # a broken link meant to feed it
            if target and decls.get(target[0]) and decls[target[0]].per_channel is not None:
                self.problem(at + ("to",), f"{target[0]} is per-channel; it is fed by its per_channel "
                             f"rule, not by links")
                target = None
        if source is None or (target is None and endpoint is None):
            ok = False
        queue = table.get("queue", DEFAULT_QUEUE)
        if isinstance(queue, bool) or not isinstance(queue, int) or not 1 <= queue <= 100000:
            self.problem(at + ("queue",), f"expected a whole number of messages from 1 to 100000, got {toml_repr(queue)}")
            ok = False
        when_full = table.get("when_full", "wait")
        if when_full not in ("wait", "drop"):
            self.problem(at + ("when_full",), f"expected 'wait' (lossless, slows the producer) or 'drop' "
                         f"(counted, flagged drops), got {toml_repr(when_full)}")
            ok = False
        insecure = table.get("insecure", False)
        if not isinstance(insecure, bool):
            self.problem(at + ("insecure",), f"expected true or false, got {toml_repr(insecure)}")
            ok = False
        keys = table.get("keys")
        if keys is not None:
            keys_dir = self.path.parent / keys if isinstance(keys, str) else None
            if keys_dir is None or not (keys_dir / "server.key_secret").is_file():
                self.problem(at + ("keys",), f"expected a folder made by 'bandloom keys' holding "
                             f"server.key_secret, got {toml_repr(keys)}")
                ok = False
            elif endpoint is None:
                self.problem(at + ("keys",), "keys apply to links with an endpoint")
                ok = False
        tolerance = self.tolerance(at + ("tolerance",), table.get("tolerance"))
        if not ok:
            return None
        return _RawLink(i, source[0], source[1], target[0] if target else None, target[1] if target else None,
                        endpoint, table.get("select"), tolerance, queue, when_full, insecure,
                        str(self.path.parent / keys) if keys else None)

    def tolerance(self, at, value):
        if value is None:
            return None
        try:
            result = parse_quantity(value, "Hz")
        except UnitError as error:
            self.problem(at, str(error))
            return None
        if result < 0:
            self.problem(at, f"expected a frequency >= 0, got {toml_repr(value)}")
            return None
        return result

    def port_ref(self, at, text, decls, declared_names, direction):
        if text is None:
            self.problem(at[:-1], f"missing '{at[-1]}' (written \"block.port\")")
            return None
        ref = _parse_ref(text)
        if ref is None:
            self.problem(at, f"expected \"block.port\", got {toml_repr(text)}")
            return None
        block, port = ref
        decl = decls.get(block)
        if decl is None:
            if block not in declared_names:
                self.problem(at, f"no block named {block!r}{_did_you_mean(block, declared_names)}")
            return None
        ports = decl.cls.outputs if direction == "output" else decl.cls.inputs
        names = [p.name for p in ports]
        if port not in names:
            kind = "outputs" if direction == "output" else "inputs"
            self.problem(at, f"{decl.cls.type_name} block {block!r} has no {direction} port {port!r}"
                         f"{_did_you_mean(port, names)}; its {kind}: {_known(names)}")
            return None
        return ref

    # -- graph --------------------------------------------------------------------------------
    def order(self, decls, links):
        """Topological order of declarations, or None (with a problem) if there is a cycle."""
        edges = {name: set() for name in decls}
        for link in links:
            if link.target:
                edges[link.source].add(link.target)
        for name, decl in decls.items():
            ref = _parse_ref(decl.per_channel.get("from")) if decl.per_channel else None
            if decl.per_channel and ref is None:
                self.problem(("blocks", name, "per_channel"), f"'from' expects \"block.port\", got "
                             f"{decl.per_channel.get('from')!r}")
            elif ref and ref[0] in decls:
                source = decls[ref[0]]
                if ref[1] not in [p.name for p in source.cls.outputs]:
                    self.problem(("blocks", name, "per_channel"), f"{source.cls.type_name} block {ref[0]!r} has "
                                 f"no output port {ref[1]!r}; its outputs: {_known(p.name for p in source.cls.outputs)}")
                else:
                    edges[ref[0]].add(name)
            elif ref:
                self.problem(("blocks", name, "per_channel"), f"no block named {ref[0]!r}"
                             f"{_did_you_mean(ref[0], decls)}")
        indegree = {n: 0 for n in decls}
        for n in edges:
            for m in edges[n]:
                indegree[m] += 1
        ready = [n for n in decls if indegree[n] == 0]
        order = []
        while ready:
            n = ready.pop(0)
            order.append(n)
            for m in sorted(edges[n]):
                indegree[m] -= 1
                if indegree[m] == 0:
                    ready.append(m)
        if len(order) < len(decls):
            stuck = [n for n in decls if n not in order]
            self.problem(("links",), f"the links form a cycle through {', '.join(stuck)}; a flow must run "
                         f"from sources to sinks without loops")
            return None
        return order

    def inputs(self, decls, links):
        for link in links:
            if link.target:
                decls[link.target].feeds.append((link.index, link.target_port))
        for name, decl in decls.items():
            if decl.per_channel:
                inputs = [p.name for p in decl.cls.inputs]
                port = decl.per_channel.get("input") or (inputs[0] if len(inputs) == 1 else None)
                if port is None or port not in inputs:
                    self.problem(("blocks", name, "per_channel"), f"say which input the channel feeds: "
                                 f"input = one of {_known(inputs)}")
                    continue
                decl.feeds.append(("per_channel", port))
            counts = {}
            for origin, port in decl.feeds:
                counts.setdefault(port, []).append(origin)
            for port, origins in counts.items():
                if len(origins) > 1:
                    where = ", ".join(f"links[{o}]" if isinstance(o, int) else "per_channel" for o in origins)
                    self.problem(("blocks", name), f"input {port!r} has {len(origins)} producers ({where}); "
                                 f"an input takes exactly one")
            for port in decl.cls.inputs:
                if port.required and port.name not in counts and (name, port.name) not in self.claimed \
                        and (name, None) not in self.claimed:
                    self.problem(("blocks", name), f"input {port.name!r} ({port.doc}) is not connected; add a "
                                 f"[[links]] table with to = \"{name}.{port.name}\"")

    # -- streams -----------------------------------------------------------------------------
    def resolve_selection(self, at, select, stream, tolerance):
        """Columns of ``stream`` picked by ``select`` (None = all); None with a problem on error."""
        if select is None or select == "all":
            return list(range(len(stream.channels)))
        items = select if isinstance(select, list) else [select]
        if not items:
            self.problem(at, "the selection is empty")
            return None
        lookup = {c: i for i, c in enumerate(stream.channels)}
        columns = []
        spacing = stream.channel_spacing
        limit = tolerance if tolerance is not None else DEFAULT_TOLERANCE_FRACTION * spacing
        available = (f"channels {min(stream.channels)}..{max(stream.channels)}" if stream.channels else "no channels")
        for item in items:
            if isinstance(item, bool):
                self.problem(at, f"expected a channel number, a range \"A..B\", a frequency or \"all\", got {toml_repr(item)}")
                return None
            if isinstance(item, int):
                picked = [item]
            elif isinstance(item, str) and re.match(r"^\s*\d+\s*\.\.\s*\d+\s*$", item):
                a, b = (int(v) for v in item.split(".."))
                if b < a:
                    self.problem(at, f"range {item!r} runs backwards; write \"{b}..{a}\"")
                    return None
                picked = list(range(a, b + 1))
            elif isinstance(item, str):
                try:
                    hz = parse_quantity(item, "Hz")
                except UnitError:
                    self.problem(at, f"expected a channel number, a range \"A..B\", a frequency such as "
                                 f"\"156.8 MHz\" or \"all\", got {toml_repr(item)}")
                    return None
                if not isinstance(item, str) or not re.search(r"[A-Za-z]", item):
                    self.problem(at, f"{item!r} has no unit: write a channel number without quotes, or a "
                                 f"frequency with its unit such as \"{item} MHz\"")
                    return None
                nearest = min(range(len(stream.channels)), key=lambda c: abs(stream.channel_frequencies[c] - hz))
                distance = abs(stream.channel_frequencies[nearest] - hz)
                if distance > limit:
                    self.problem(at, f"{format_frequency(hz)} is {format_frequency(distance)} from the nearest "
                                 f"channel centre, {format_frequency(stream.channel_frequencies[nearest])} (channel "
                                 f"{stream.channels[nearest]}); the tolerance is {format_frequency(limit)} — pick a "
                                 f"channel centre or set 'tolerance'")
                    return None
                picked = [stream.channels[nearest]]
            else:
                self.problem(at, f"expected a channel number, a range \"A..B\", a frequency or \"all\", got {toml_repr(item)}")
                return None
            for channel in picked:
                if channel not in lookup:
                    self.problem(at, f"channel {channel} does not exist: the stream has {available}")
                    return None
                if lookup[channel] in columns:
                    self.problem(at, f"channel {channel} is selected twice")
                    return None
                columns.append(lookup[channel])
        return columns

    def accept(self, at, port, stream, describe):
        """Problem unless ``stream`` can enter ``port``; ``describe`` names the input for messages."""
        if port.kind == "samples" and stream.kind != "samples":
            self.problem(at, f"{describe} takes one stream of samples but the link carries "
                         f"{len(stream.channels)} channels; select one channel with 'select'")
            return False
        if port.kind == "channels" and stream.kind != "channels":
            self.problem(at, f"{describe} takes several channels side by side but the link carries one stream; "
                         f"select two or more channels, or 'all'")
            return False
        if stream.sample_type not in port.sample_types:
            self.problem(at, f"{describe} takes {'/'.join(port.sample_types)} samples but the link carries "
                         f"{stream.sample_type}")
            return False
        return True

    def build(self, decls, links, order):
        instances = {}
        expanded = []
        made = {}                                    # declared name -> [instance names]
        next_id = 0

        def where_of(origin, name):
            return ("links", origin) if isinstance(origin, int) else ("blocks", name, "per_channel")

        for name in order:
            decl = decls[name]
            specs = []
            if not decl.ok:
                made[name] = []          # its own problems are reported; its outputs are unknown
                continue                               # (instance name, placeholders, {port: (link kwargs)})
            if decl.per_channel:
                ref = _parse_ref(decl.per_channel["from"])
                source_decl = decls[ref[0]]
                port = next((p for origin, p in decl.feeds if origin == "per_channel"), None)
                if port is None or not made.get(ref[0]):
                    continue
                if source_decl.per_channel:
                    if "select" in decl.per_channel:
                        self.problem(("blocks", name, "per_channel"), f"{ref[0]} is already per-channel; "
                                     f"leave out 'select' (one copy of {name} follows each copy of {ref[0]})")
                        continue
                    for src in made[ref[0]]:
                        inst = instances[src]
                        stream = inst.output_streams.get(ref[1])
                        if stream is None:
                            continue
                        specs.append((f"{name}[{inst.placeholders['channel']}]", dict(inst.placeholders),
                                      {port: dict(source=src, source_port=ref[1], columns=None, stream=stream,
                                                  where=("blocks", name, "per_channel"))}))
                else:
                    src = made[ref[0]][0]
                    stream = instances[src].output_streams.get(ref[1])
                    if stream is None:
                        continue
                    if stream.kind != "channels":
                        self.problem(("blocks", name, "per_channel"), f"{ref[0]}.{ref[1]} carries one stream, "
                                     f"not channels; per_channel needs a channelizer's output")
                        continue
                    tolerance = self.tolerance(("blocks", name, "per_channel"), decl.per_channel.get("tolerance"))
                    columns = self.resolve_selection(("blocks", name, "per_channel"),
                                                     decl.per_channel.get("select"), stream, tolerance)
                    if columns is None:
                        continue
                    for c in columns:
                        channel, hz = stream.channels[c], stream.channel_frequencies[c]
                        placeholders = {"channel": channel, "frequency": int(round(hz)), "frequency_mhz": hz / 1e6}
                        specs.append((f"{name}[{channel}]", placeholders,
                                      {port: dict(source=src, source_port=ref[1], columns=[c],
                                                  stream=stream.select([c]), where=("blocks", name, "per_channel"))}))
            else:
                wiring = {}
                for link in links:
                    if link.target != name:
                        continue
                    resolved = self.link_stream(link, decls, made, instances)
                    if resolved is None:
                        continue
                    src, stream, columns = resolved
                    wiring[link.target_port] = dict(source=src, source_port=link.source_port, columns=columns,
                                                    stream=stream, where=("links", link.index), raw=link)
                specs.append((name, {}, wiring))
            made[name] = []
            for inst_name, placeholders, wiring in specs:
                inst = Instance(inst_name, name, decl.cls.type_name, decl.cls, dict(decl.params), placeholders)
                good = True
                for port_name, w in wiring.items():
                    port = decl.cls.find_port(port_name, "input")
                    at = w["where"] + (("to",) if isinstance(w["where"][-1], int) else ())
                    if not self.accept(at, port, w["stream"], f"{inst_name}.{port_name}"):
                        good = False
                        continue
                    raw = w.get("raw")
                    link = Link(next_id, self._where(w["where"]), w["source"], w["source_port"], w["columns"],
                                inst_name, port_name, None, w["stream"],
                                queue=raw.queue if raw else DEFAULT_QUEUE, when_full=raw.when_full if raw else "wait")
                    next_id += 1
                    inst.inputs[port_name] = link
                    inst.input_streams[port_name] = w["stream"]
                    instances[w["source"]].outputs.setdefault(w["source_port"], []).append(link)
                    expanded.append(link)
                unfed = [p.name for p in decl.cls.inputs if p.required and p.name not in inst.input_streams]
                if not good or unfed:
                    continue             # reported already (unconnected, or fed by a broken link)
                context = BlockContext(inst_name, self.path, self.output_dir, placeholders)
                try:
                    block = decl.cls(dict(decl.params), context)
                    inst.output_streams = block.output_streams(dict(inst.input_streams))
                except BlockError as error:
                    if error.param:
                        self.problem(("blocks", name, error.param), str(error))
                    elif error.port and error.port in inst.inputs:
                        where = self._path(inst.inputs[error.port].where)
                        where += ["to"] if where[0] == "links" else []
                        self.problem(tuple(where), f"{inst_name}.{error.port}: {error}")
                    else:
                        self.problem(("blocks", name), str(error))
                    continue
                instances[inst_name] = inst
                made[name].append(inst_name)
        # links to fixed endpoints
        for link in links:
            if link.endpoint is None:
                continue
            resolved = self.link_stream(link, decls, made, instances)
            if resolved is None:
                continue
            src, stream, columns = resolved
            out = Link(next_id, f"links[{link.index}]", src, link.source_port, columns, None, None, link.endpoint,
                       stream, queue=link.queue, when_full=link.when_full, insecure=link.insecure, keys=link.keys)
            next_id += 1
            instances[src].outputs.setdefault(link.source_port, []).append(out)
            expanded.append(out)
        return instances, expanded

    def link_stream(self, link, decls, made, instances):
        """(source instance, stream after the link's selection, selected columns) or None with a problem."""
        if not made.get(link.source):
            return None                     # the source had problems of its own, reported already
        if decls[link.source].per_channel:
            self.problem(("links", link.index, "from"), f"{link.source} is per-channel "
                         f"({len(made[link.source])} copies); feed its outputs to blocks that are per-channel "
                         f"too, with per_channel = {{ from = \"{link.source}.{link.source_port}\" }}")
            return None
        src = made[link.source][0]
        stream = instances[src].output_streams.get(link.source_port)
        if stream is None:
            return None
        columns = None
        if link.select is not None:
            if stream.kind != "channels":
                self.problem(("links", link.index, "select"), f"{link.source}.{link.source_port} carries one "
                             f"stream, not channels; there is nothing to select")
                return None
            columns = self.resolve_selection(("links", link.index, "select"), link.select, stream, link.tolerance)
            if columns is None:
                return None
            stream = stream.select(columns)
        return src, stream, columns

    @staticmethod
    def _where(path):
        text = ""
        for part in path:
            text += f"[{part}]" if isinstance(part, int) else (f".{part}" if text else str(part))
        return text

    @staticmethod
    def _path(where):
        parts = []
        for token in re.findall(r"[^.\[\]]+|\[\d+\]", where):
            parts.append(int(token[1:-1]) if token.startswith("[") else token)
        return parts


def _syntax_problem(path, error):
    text = str(error)
    m = re.search(r"\(at line (\d+), column (\d+)\)", text)
    line = getattr(error, "lineno", None) or (int(m.group(1)) if m else None)
    column = getattr(error, "colno", None) or (int(m.group(2)) if m else None)
    message = re.sub(r"\s*\(at line \d+, column \d+\)", "", getattr(error, "msg", text) or text)
    message = re.sub(r"\s*\(at end of document\)", " (at the end of the file)", message)
    if message.startswith("Illegal character '\\n'"):
        message += " — a line ends inside a value; is a closing quote or bracket missing?"
    return Problem(str(path), "", f"TOML syntax error: {message}", line, column)


def load_flow(path, registry, *, output_dir=None):
    """Parse and validate a flow file; return a Flow or raise FlowErrors with every problem."""
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except OSError as error:
        raise FlowErrors([Problem(str(path), "", f"cannot read the flow file: {error.strerror}")]) from None
    except UnicodeDecodeError as error:
        raise FlowErrors([Problem(str(path), "", f"the flow file is not UTF-8 text ({error.reason} at byte "
                                                 f"{error.start})")]) from None
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as error:
        raise FlowErrors([_syntax_problem(path, error)]) from None
    checker = _Checker(path, text, registry, output_dir)
    meta, decls, links = checker.declarations(data)
    order = checker.order(decls, links)
    checker.inputs(decls, links)
    instances, expanded = ({}, [])
    if order is not None:
        # streams are worked out for every block that was declared well, so that their
        # problems are reported along with the others
        instances, expanded = checker.build(decls, links, order)
    for attribute, what in (("uses_stdin", "read standard input"), ("uses_stdout", "write standard output")):
        users = [i.name for i in instances.values() if getattr(i.cls, attribute)]
        if len(users) > 1:
            checker.problem(("blocks", users[1].split("[")[0]), f"{len(users)} blocks ({', '.join(users)}) "
                            f"{what}; a run has one, so only one block may")
    if checker.problems:
        raise FlowErrors(checker.problems)
    return Flow(path, meta.get("name", path.stem), meta.get("description", ""), instances, expanded)
