"""Placing a flow on several machines: the ``[hosts.NAME]`` tables, each block's ``host``, and the ports.

A flow with hosts is run as one *share* per host, each started there with
``bandloom run FLOW --host NAME`` (see :mod:`bandloom.runtime.shares`). Every
block then says which host it runs on (``host = "NAME"``; a per-channel block's
copies all run on its host). Links whose two ends are on the same host stay
private ``ipc://`` sockets; a link whose ends are on different hosts is served
over TCP by its source's host, on a port of that host's range (see
:meth:`.model.Flow.link_port`), encrypted and authenticated with the key folder
``[flow] keys`` of which every host holds a copy, unless ``[flow] insecure =
true`` (which warns).
"""

from __future__ import annotations

import ipaddress
import re
from pathlib import Path
from typing import Any

from bandloom.blocks.block import Param, toml_repr

from ..keys import key_folder_problem
from .model import Host, Instance, Link
from .problems import KeyPath, ProblemLog, did_you_mean, known_names

__all__ = ["HOST_KEYS", "HOST_OPTIONS", "check_host_ports", "check_placement", "read_hosts"]

DEFAULT_PORT = 47000
HOST_OPTIONS: tuple[Param, ...] = (
    Param("address", "str", "where the other hosts reach this one: an IP address or a DNS name",
          rule="an IP address (10.0.0.2, fd00::2) or a DNS name (decoder-2.example.net)"),
    Param("listen", "str", "the local address this host's share listens on (default: the address when it is "
          "an IP address, else '*', every address)", default=None, rule="an IP address of this host, or '*'"),
    Param("port", "int", "the first of this host's TCP ports: its share's channel to the other shares; each link "
          "leaving the host takes one of the ports after it", default=DEFAULT_PORT, minimum=1024, maximum=65000,
          rule="a TCP port from 1024 to 65000"),
)
HOST_KEYS = tuple(p.name for p in HOST_OPTIONS)
_NAME = re.compile(r"[A-Za-z][A-Za-z0-9_-]{0,63}\Z")
_DNS_NAME = re.compile(r"(?=.{1,253}\Z)([A-Za-z0-9]([A-Za-z0-9-]{0,61}[A-Za-z0-9])?)(\.[A-Za-z0-9]([A-Za-z0-9-]{0,61}"
                       r"[A-Za-z0-9])?)*\Z")


def _is_ip(text: str) -> bool:
    try:
        ipaddress.ip_address(text)
    except ValueError:
        return False
    return True


def read_hosts(data: Any, log: ProblemLog) -> dict[str, Host]:
    """The ``[hosts.NAME]`` tables, checked; problems go to ``log``."""
    if data is None:
        return {}
    if not isinstance(data, dict) or not data:
        log.add(("hosts",), "expected tables [hosts.NAME] with an address each")
        return {}
    hosts: dict[str, Host] = {}
    for name, table in data.items():
        at: KeyPath = ("hosts", name)
        if not _NAME.match(name):
            log.add(at, "host names start with a letter and use letters, digits, '-' and '_' (at most 64)")
            continue
        if not isinstance(table, dict):
            log.add(at, f"expected a table [hosts.{name}] with an address, got {toml_repr(table)}")
            continue
        for key in table:
            if key not in HOST_KEYS:
                log.add(at + (key,), f"unknown key; a host takes {known_names(HOST_KEYS)}{did_you_mean(key, HOST_KEYS)}")
        values: dict[str, Any] = {}
        good = True
        for param in HOST_OPTIONS:
            if param.name not in table:
                if param.required:
                    log.add(at, f"missing '{param.name}' ({param.doc})")
                    good = False
                values[param.name] = param.default
                continue
            try:
                values[param.name] = param.convert(table[param.name])
            except ValueError as error:
                log.add(at + (param.name,), str(error))
                good = False
        if not good:
            continue
        address, listen = values["address"], values["listen"]
        if not (_is_ip(address) or _DNS_NAME.match(address)):
            log.add(at + ("address",), f"expected {HOST_OPTIONS[0].rule}, got {toml_repr(address)}")
            continue
        if listen is None:
            listen = address if _is_ip(address) else "*"
        elif listen != "*" and not _is_ip(listen):
            log.add(at + ("listen",), f"expected {HOST_OPTIONS[1].rule}, got {toml_repr(listen)}")
            continue
        hosts[name] = Host(name=name, address=address, listen=listen, port=values["port"])
    return hosts


def check_placement(log: ProblemLog, hosts: dict[str, Host], declared: set[str], placed: dict[str, Any],
                    meta: dict[str, Any], flow_dir: Path) -> str | None:
    """Every block names a declared host (when there are hosts) and none does otherwise; the hosts' keys
    (``[flow] keys``) or ``[flow] insecure``. ``declared`` names every [hosts.NAME] table, read well or not
    (a block on a host with problems of its own is not told the host is unknown); ``placed`` maps block
    names to their ``host`` values (None: not given). Returns the key folder, resolved, or None."""
    keys, insecure = meta.get("keys"), meta.get("insecure")
    if not declared:
        for name, host in placed.items():
            if host is not None:
                log.add(("blocks", name, "host"), "this flow declares no hosts; add [hosts.NAME] tables with an "
                        "address each, or leave 'host' out")
        for key in ("keys", "insecure"):
            if meta.get(key):
                log.add(("flow", key), f"{key} applies to links between hosts; this flow declares no [hosts.NAME]")
        return None
    for name, host in placed.items():
        if host is None:
            log.add(("blocks", name), f"this flow runs on several hosts: say where the block runs, host = one of "
                    f"{known_names(hosts)}")
        elif not isinstance(host, str) or host not in declared:
            log.add(("blocks", name, "host"), f"no host named {toml_repr(host)}"
                    f"{did_you_mean(host, declared) if isinstance(host, str) else ''}; hosts: {known_names(declared)}")
    used = {host for host in placed.values() if isinstance(host, str)}
    for name in hosts if used <= set(hosts) else ():        # (a misspelt host is the problem, not an idle one)
        if name not in used:
            log.add(("hosts", name), f"no block runs on host {name}; place a block there (host = \"{name}\") or "
                    f"leave the host out")
    if keys and insecure:
        log.add(("flow", "insecure"), "give keys (encrypted) or insecure = true (in the clear), not both")
        return None
    if not keys:
        if not insecure:
            log.add(("flow",), "links between hosts need keys = \"FOLDER\" (made by 'bandloom keys FOLDER' and "
                    "copied to every host) to encrypt and authenticate them, or insecure = true to send them in "
                    "the clear")
        return None
    folder = flow_dir / keys
    problem = key_folder_problem(folder)
    if problem is None and not (folder / "client.key_secret").is_file():
        problem = f"{folder / 'client.key_secret'} is missing: every host needs the whole folder 'bandloom keys' made"
    if problem is None and not (folder / "server.key").is_file():
        problem = f"{folder / 'server.key'} is missing: every host needs the whole folder 'bandloom keys' made"
    if problem:
        log.add(("flow", "keys"), problem)
        return None
    return str(folder)


def check_host_ports(log: ProblemLog, hosts: dict[str, Host], instances: dict[str, Instance],
                     links: list[Link]) -> None:
    """Each host's ports (its own, then one per link leaving it) fit below 65536 and do not overlap the
    ports of another host that listens on the same address (several shares on one machine)."""
    leaving = {name: 0 for name in hosts}
    for link in links:
        if link.target and instances[link.source].host != instances[link.target].host:
            leaving[instances[link.source].host or ""] += 1
    ranges = {name: (host.port, host.port + leaving[name]) for name, host in hosts.items()}
    for name, (first, last) in ranges.items():
        if last > 65535:
            log.add(("hosts", name, "port"), f"host {name} needs ports {first}..{last} ({leaving[name]} links leave "
                    f"it) and the last is beyond 65535; choose a lower port")
    names = list(hosts)
    for i, a in enumerate(names):
        for b in names[i + 1:]:
            same_place = hosts[a].listen == hosts[b].listen or "*" in (hosts[a].listen, hosts[b].listen)
            if same_place and ranges[a][0] <= ranges[b][1] and ranges[b][0] <= ranges[a][1]:
                log.add(("hosts", b, "port"), f"hosts {a} and {b} listen on the same address and their ports "
                        f"overlap ({a}: {ranges[a][0]}..{ranges[a][1]}, {b}: {ranges[b][0]}..{ranges[b][1]}); "
                        f"give {b} a port above {ranges[a][1]}")
