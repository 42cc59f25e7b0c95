"""``bandloom check``, ``bandloom run``, ``bandloom blocks`` and ``bandloom keys``."""

from __future__ import annotations

import argparse
import contextlib
import json
import signal
import sys
from pathlib import Path
from typing import TextIO

from bandloom.blocks.block import REQUIRED, Param, toml_repr
from bandloom.blocks.text_tables import render_rows
from bandloom.blocks.units import format_frequency

from .arguments import number_between
from .cli import Interrupted
from .flow import Flow, FlowErrors, format_key_path, load_flow, process_groups
from .flow.declarations import BLOCK_OPTIONS
from .flow.overrides import parse_override
from .launcher import Launcher, take_launcher
from .metrics import MetricsAddressError, MetricsServer, is_loopback, parse_metrics_address
from .plugins import Registry, load_registry
from .run_report import print_summary
from .shares import flow_digest
from .supervisor import DRAIN_SECONDS, WAIT_FOR_HOSTS, RunOutcome, Supervisor

__all__ = ["EXIT_FAILED", "EXIT_LOST", "EXIT_OK", "blocks_markdown", "run_blocks", "run_check", "run_keys",
           "run_run"]


#: Exit statuses of ``bandloom run`` (docs/reliability.md). An interrupted run ends the way Python does on
#: Ctrl-C (killed by SIGINT, shell status 130), or on SIGTERM killed by SIGTERM (143); a flow with
#: problems exits 1 from ``check`` and ``run`` alike.
EXIT_OK = 0             # finished; nothing lost, or only loss the flow or the command line accepted
EXIT_FAILED = 1         # a block failed or died, or the flow has problems
EXIT_LOST = 3           # finished, but samples were lost and nothing accepted that


def _registry(log: TextIO) -> Registry:
    registry = load_registry()
    for line in registry.failures:
        print(f"bandloom: warning: {line}", file=log)
    return registry


def _load(args: argparse.Namespace, log: TextIO) -> Flow | None:
    registry = _registry(log)
    try:
        overrides = [parse_override(text) for text in getattr(args, "set", None) or []]
        flow = load_flow(args.flow, registry, output_dir=getattr(args, "out", None), overrides=overrides)
        for link in flow.links:
            if link.options.insecure and link.endpoint:
                print(f"bandloom: warning: {flow.path}: {format_key_path(link.where)}: {link.endpoint} sends samples "
                      f"in the clear, unauthenticated, to any program on any machine that can reach it "
                      f"(insecure = true); use keys = \"FOLDER\" unless the network is yours alone", file=log)
        if flow.hosts_insecure:
            print(f"bandloom: warning: {flow.path}: [flow] insecure = true: samples cross between hosts in the "
                  f"clear, unauthenticated; anyone on the network can read them or feed a host; use keys = \"FOLDER\" "
                  f"unless the network is yours alone", file=log)
        return flow
    except FlowErrors as errors:
        for problem in errors.problems:
            print(str(problem), file=log)
        count = len(errors.problems)
        print(f"bandloom: {count} problem{'s' if count != 1 else ''} in {args.flow}", file=log)
        return None


def add_override_argument(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--set", action="append", default=[], metavar="BLOCK.KEY=VALUE",
                        help="override a block parameter (or flow.KEY) for this run, checked like the file; "
                             "repeat for several; files read are relative to the current folder")


def add_check_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("flow", help="the flow file (TOML)")
    add_override_argument(parser)
    parser.add_argument("--out", help="output folder the run would use (default: current folder)")


def run_check(args: argparse.Namespace, out: TextIO, log: TextIO | None = None) -> int:
    log = log or sys.stderr
    flow = _load(args, log)
    if flow is None:
        return 1
    processes = len(process_groups(flow.instances.values()))
    blocks = (f"{len(flow.instances)} block processes" if processes == len(flow.instances) else
              f"{len(flow.instances)} blocks in {processes} processes")
    out.write(f"{args.flow}: ok: {blocks}, {len(flow.links)} links\n")
    for inst in flow.instances.values():
        for port, stream in inst.output_streams.items():
            if stream.kind == "channels":
                desc = (f"{len(stream.channels)} channels at {format_frequency(stream.sample_rate)} each, "
                        f"spaced {format_frequency(stream.channel_spacing)}")
            else:
                desc = f"{stream.sample_type} at {format_frequency(stream.sample_rate)}, centre " \
                       f"{format_frequency(stream.centre_frequency)}"
            out.write(f"  {inst.name}.{port}: {desc}\n")
    for line in describe_hosts(flow):
        out.write(line + "\n")
    return 0


def describe_hosts(flow: Flow) -> list[str]:
    """For a flow placed on hosts: each host's blocks and the TCP ports it listens on (for its firewall),
    then each link between hosts with the bandwidth it needs (samples/s x bytes per sample x channels)."""
    if not flow.hosts:
        return []
    lines = ["hosts (start each with 'bandloom run FLOW --host NAME'; open these TCP ports to the other hosts):"]
    crossing = flow.crossing_links()
    for name, host in flow.hosts.items():
        blocks = flow.share(name)
        shown = ", ".join(blocks[:8]) + (f" and {len(blocks) - 8} more" if len(blocks) > 8 else "")
        ports = [flow.link_port(link) for link in crossing if flow.instances[link.source].host == name]
        served = f", {ports[0]}..{ports[-1]} (links to other hosts)" if ports else ""
        lines.append(f"  {name} ({host.address}): {shown or 'no blocks'}; TCP {host.port} (the hosts' channel){served}")
    if crossing:
        lines.append("links between hosts:")
    total = 0.0
    for link in crossing:
        stream = link.stream
        rate = stream.bytes_per_second
        total += rate
        source, target = flow.instances[link.source].host, flow.instances[link.target or ""].host
        lines.append(f"  {link.label}: {source} -> {target} on port {flow.link_port(link)}, "
                     f"{format_frequency(stream.sample_rate).replace('Hz', 'samples/s')} x {stream.dtype.itemsize} B"
                     f"{f' x {stream.width} channels' if stream.width > 1 else ''} = {rate * 8 / 1e6:.1f} Mbit/s")
    if crossing:
        lines.append(f"  all links between hosts: {total * 8 / 1e6:.1f} Mbit/s (samples only; headers add well under 1 %)")
    return lines


def add_run_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("flow", help="the flow file (TOML)")
    add_override_argument(parser)
    parser.add_argument("--out", help="folder for output files (default: current folder)")
    parser.add_argument("--quiet", action="store_true", help="print only errors and the verdict line")
    parser.add_argument("--accept-loss", action="store_true", help="exit 0 even if samples were lost (the verdict "
                        "still counts them); the flow file can say so with accept_loss = true under [flow]")
    parser.add_argument("--report", metavar="FILE", help="also write the run summary as JSON to FILE")
    parser.add_argument("--metrics", metavar="[HOST:]PORT",
                        help="serve the run's counters for a Prometheus scraper at http://HOST:PORT/metrics "
                             "(HOST defaults to 127.0.0.1; another address warns that it is open to the network)")
    parser.add_argument("--host", metavar="NAME", help="run this host's share of a flow placed on several hosts "
                        "([hosts.NAME] in the file); every host runs the same file with its own name")
    parser.add_argument("--one-machine", action="store_true", help="run every block of a flow placed on several "
                        "hosts here, on this one machine (links stay local), to try the flow before placing it")
    parser.add_argument("--wait-for-hosts", type=number_between(1, 86400, "seconds"), default=WAIT_FOR_HOSTS,
                        metavar="SECONDS",
                        help=f"with --host: how long to wait for the other hosts' shares before giving up, naming "
                             f"those missing (default {WAIT_FOR_HOSTS:g})")
    parser.add_argument("--drain-time", type=number_between(0, 3600, "seconds"), default=DRAIN_SECONDS,
                        metavar="SECONDS",
                        help=f"after Ctrl-C, wait this long for the flow to drain before aborting it (what is "
                             f"still queued then is counted as lost; default {DRAIN_SECONDS:g})")


def _share_problem(args: argparse.Namespace, flow: Flow) -> str | None:
    """What is wrong with --host / --one-machine for this flow, or None."""
    host, one = getattr(args, "host", None), getattr(args, "one_machine", False)
    names = ", ".join(flow.hosts)
    if not flow.hosts:
        if host:
            return f"{args.flow} declares no hosts ([hosts.NAME]); run it without --host"
        return None
    if host and one:
        return "give --host NAME (this host's share) or --one-machine (every block here), not both"
    if host is None and not one:
        return (f"{args.flow} places its blocks on hosts {names}: run 'bandloom run {args.flow} --host NAME' on each "
                f"of them, or --one-machine to run every block here")
    if host is not None and host not in flow.hosts:
        return f"--host {host!r} is not a host of {args.flow}; its hosts: {names}"
    return None


def run_run(args: argparse.Namespace, out: TextIO, log: TextIO | None = None) -> int:
    log = log or sys.stderr
    with take_launcher(args.flow) as launcher:     # imports what workers need while the flow is checked
        flow = _load(args, log)
        if flow is None:
            return 1
        return _run_checked(args, flow, launcher, log)


def _run_checked(args: argparse.Namespace, flow: Flow, launcher: Launcher, log: TextIO) -> int:
    output_dir = Path(args.out) if args.out else Path.cwd()
    problem = _share_problem(args, flow)
    if problem:
        print(f"bandloom: {problem}", file=log)
        return EXIT_FAILED
    here = getattr(args, "host", None)
    supervisor = Supervisor(flow, output_dir=output_dir, quiet=args.quiet, log=log, drain_seconds=args.drain_time,
                            launcher=launcher, here=here, wait_for_hosts=getattr(args, "wait_for_hosts", WAIT_FOR_HOSTS),
                            digest=flow_digest(flow.path, getattr(args, "set", None) or []) if here else "")
    with contextlib.ExitStack() as stack:
        if args.metrics:
            try:
                host, port = parse_metrics_address(args.metrics)
                server = stack.enter_context(MetricsServer(supervisor, host, port))
            except MetricsAddressError as error:
                print(f"bandloom: {error}", file=log)
                return EXIT_FAILED
            if not is_loopback(host):
                print(f"bandloom: warning: metrics at {server.url} are open to every machine that can reach this "
                      f"one (names of blocks and links, counts); use a loopback address or a firewall", file=log)
            elif not args.quiet:
                print(f"bandloom: metrics at {server.url}", file=log)
        try:
            outcome = supervisor.run()
        except OSError as error:          # this host's share cannot listen where the flow file says
            print(f"bandloom: {error}", file=log)
            return EXIT_FAILED
    summary = supervisor.summary(accept_loss=args.accept_loss)
    print_summary(summary, supervisor.failures(), log, quiet=args.quiet)
    if args.report:
        report = Path(args.report)
        report.parent.mkdir(parents=True, exist_ok=True)      # (a missing folder must not lose the summary)
        report.write_text(json.dumps(summary, indent=2) + "\n")
    if outcome is RunOutcome.INTERRUPTED and (supervisor.stop_signal or not here):
        raise Interrupted(supervisor.stop_signal or signal.SIGINT)
    others = summary.get("other_hosts", {}).values()
    if outcome is RunOutcome.FAILED or any(h["lost"] or h["outcome"] == "failed" for h in others):
        return EXIT_FAILED
    lost = summary["lost_samples_not_accepted"] + sum(h["lost_samples_not_accepted"] for h in others)
    return EXIT_LOST if lost else EXIT_OK


def add_blocks_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("type", nargs="?", help="show one block type's parameters and ports")
    parser.add_argument("--markdown", action="store_true", help="print the reference of every block type as "
                        "Markdown (docs/blocks.md is made this way)")


def _default(param: Param) -> str:
    if param.default is REQUIRED:
        return "required"
    if param.default is None:
        return "(see text)"
    if isinstance(param.default, float):
        return f"{param.default:g}"
    return toml_repr(param.default)


def blocks_markdown(registry: Registry, names: list[str]) -> str:
    lines = ["# Block reference", "",
             "Made by `bandloom blocks --markdown`; do not edit by hand. Parameters with units accept "
             "\"2.4 MHz\", \"25 kHz\", \"-30 dBFS\", \"1.5 s\" or a plain number in the base unit.", "",
             "## Keys of every block with inputs", "",
             "What the run does when the block's process fails or dies (docs/flow-files.md, \"When a block fails\").",
             "", "| key | type | default | meaning |", "|---|---|---|---|"]
    lines += [f"| `{p.name}` | {p.describe_type()} | {_default(p)} | {p.doc} |" for p in BLOCK_OPTIONS] + [""]
    for name in names:
        cls = registry.types[name]
        lines += [f"## {name}", "", cls.summary, ""]
        if cls.restartable:
            lines += ['Can be restarted part way through a stream (`on_failure = "restart"`).', ""]
        if cls.details:
            lines += [cls.details, ""]
        if cls.parameters:
            lines += ["| parameter | type | default | meaning |", "|---|---|---|---|"]
            for p in cls.parameters:
                kind = p.describe_type().replace("|", "\\|")
                lines.append(f"| `{p.name}` | {kind} | {_default(p)} | {p.doc} |")
            lines.append("")
        for title, ports in (("Inputs", cls.inputs), ("Outputs", cls.outputs)):
            if ports:
                lines.append(f"{title}: " + "; ".join(
                    f"`{port.name}` ({port.kind}, {'/'.join(port.sample_types)}"
                    f"{'' if port.required else ', optional'}) {port.doc}" for port in ports) + ".")
                lines.append("")
    return "\n".join(lines)


def run_blocks(args: argparse.Namespace, out: TextIO, log: TextIO | None = None) -> int:
    log = log or sys.stderr
    registry = _registry(log)
    if args.markdown:
        own = [n for n in registry.names() if registry.origins[n] == "bandloom"]
        out.write(blocks_markdown(registry, own) + "\n")
        return 0
    if not args.type:
        rows = [[name, registry.origins[name], registry.types[name].summary] for name in registry.names()]
        out.write(render_rows(["type", "from", "what it does"], rows) + "\n")
        return 0
    cls = registry.types.get(args.type)
    if cls is None:
        import difflib
        hint = difflib.get_close_matches(args.type, registry.names(), n=1)
        raise ValueError(f"no block type {args.type!r}" + (f"; did you mean {hint[0]!r}?" if hint else "")
                         + f" (known: {', '.join(registry.names())})")
    out.write(f"{cls.type_name}: {cls.summary}\n\nparameters:\n")
    rows = [[p.name, p.describe_type(), p.unit or "", _default(p), p.doc] for p in cls.parameters]
    out.write((render_rows(["name", "type", "unit", "default", "meaning"], rows) if rows else "  (none)") + "\n")
    for title, ports in (("inputs", cls.inputs), ("outputs", cls.outputs)):
        out.write(f"\n{title}:\n")
        if not ports:
            out.write("  (none)\n")
        for port in ports:
            out.write(f"  {port.name} ({port.kind}, {'/'.join(port.sample_types)}): {port.doc}\n")
    if cls.details:
        out.write("\n" + cls.details.replace("`", "") + "\n")
    if cls.inputs:
        can = 'on_failure = "stop", "restart" or "continue"' if cls.restartable else \
            'on_failure = "stop" or "continue" (it cannot take over part way through a stream)'
        out.write(f"\nwhen it fails: {can}\n")
    return 0


def add_keys_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("folder", help="folder to create the key pairs in")


def run_keys(args: argparse.Namespace, out: TextIO, log: TextIO | None = None) -> int:
    log = log or sys.stderr
    from .keys import make_key_folder

    folder = make_key_folder(args.folder)
    out.write(f"{folder}/server.key_secret   the link's own key pair (keep secret; name the folder in keys = ...)\n"
              f"{folder}/server.key          public key the outside program needs\n"
              f"{folder}/client.key_secret   the outside program's key pair (copy it to that machine)\n"
              f"{folder}/authorized/         public keys allowed to connect\n")
    return 0
