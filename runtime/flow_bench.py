"""``bandloom bench --flow FLOW``: a whole flow's speed, as ratios measured in the same run.

Method (docs/performance.md):

* The flow runs as ``bandloom run`` does, in a process of its own, at two
  lengths: as the file says, and ``lengthen`` times longer (every source's
  :attr:`~bandloom.blocks.block.Block.length_parameter` scaled: a file's
  ``repeat``, a scenario's ``duration``). Each length runs ``runs`` times and
  the fastest counts. The *steady rate* is the extra input samples of the long
  run over its extra wall-clock time, so start-up and the end cancel.
* *Start-up* is the time from starting the command until every block without
  outputs (the sinks) has taken its first samples, in the short run.
* The *baseline* is the flow's channelizer (each one fed straight by a
  source) run in this process on the same data (the short run's): the source
  block is run here too, untimed, and only the channelizer block's own work on
  each chunk is timed. One pass follows every run of the flow (so at least
  two), and the fastest pass counts: the baseline is taken across the same
  minutes as the flow, not in one moment a busy or quiet machine would tilt.
  The ratio is the flow's steady input rate over that in-process rate.
* Per block, its *busy* fraction: time inside its own code (produce, consume,
  finish) over the time from its first samples to its end, and its process's
  CPU time (every thread, user and system) per input sample, from the long run's
  extra CPU over its extra samples; per link, the
  bytes it carried and the bytes its sender copied (to gather channels,
  change their type, batch rows or place them in shared memory), per input
  sample of the flow, and the share of its messages that went through shared
  memory. Each byte that goes through a socket instead is also copied twice
  by the kernel, once into the socket and once out.

Ratios compare between machines; seconds do not. No test asserts on them.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import tempfile
import time
from argparse import Namespace
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, TextIO

from bandloom.blocks.block import BlockContext, chunks_of
from bandloom.blocks.text_tables import engineering, render_rows

from .flow import Flow, FlowErrors, Instance, load_flow
from .flow.overrides import parse_override
from .plugins import load_registry

__all__ = ["FlowRun", "FlowRunFailed", "measure_flow", "run_flow_bench"]

CHANNELIZER = "channelizer"


class FlowRunFailed(RuntimeError):
    """A run of the flow being measured failed or lost samples; the message has the end of its stderr."""


@dataclass(frozen=True)
class FlowRun:
    """One run of the flow: its input samples, wall-clock seconds, start-up seconds and the --report summary."""

    input_samples: int
    seconds: float
    startup_seconds: float | None
    summary: dict[str, Any] = field(repr=False)


def _length_overrides(flow: Flow, factor: int) -> list[str]:
    """``--set`` texts that make every source ``factor`` times longer; ValueError for a source that cannot."""
    sets = []
    for inst in flow.instances.values():
        if not inst.cls.is_source:
            continue
        key = inst.cls.length_parameter
        if key is None:
            raise ValueError(f"bench --flow runs the flow at two lengths, but block {inst.name!r} "
                             f"({inst.type_name}) has no parameter that sets its length; use a recording "
                             f"(iq-reader) or a scenario as the source")
        value = inst.params[key]
        sets.append(f"{inst.declared}.{key}={value * factor!r}")
    return sets


def in_process_rate(flow: Flow, channelizer: Instance, out_dir: Path) -> float:
    """Input samples per second of ``channelizer``'s own work in this process, fed by its source block
    (run here too, untimed) with the same data the flow gives it."""
    link = channelizer.inputs["samples"]
    source = flow.instances[link.source]

    def context(inst: Instance) -> BlockContext:
        return BlockContext(inst.name, flow.path, out_dir, inst.placeholders)

    channelizer.cls.preload()               # compiled kernels loaded before the clock runs, as in a worker
    producer = source.cls(dict(source.params), context(source))
    producer.output_streams({})
    producer.start({})
    bank = channelizer.cls(dict(channelizer.params), context(channelizer))
    bank.output_streams(channelizer.input_streams)
    bank.start(channelizer.input_streams)
    producer.begin()
    busy = 0.0
    samples = 0
    try:
        while (produced := producer.produce()) is not None:
            for chunk in (c for value in produced.values() for c in chunks_of(value)):
                samples += chunk.count
                began = time.perf_counter()
                bank.consume("samples", chunk)
                busy += time.perf_counter() - began
        began = time.perf_counter()
        bank.finish()
        busy += time.perf_counter() - began
    finally:
        producer.close()
        bank.close()
    return samples / busy if busy else float("nan")


def measure_flow(flow: Flow, sets: list[str], *, out_dir: Path) -> FlowRun:
    """Run the flow once as ``bandloom run`` in a process of its own; raise FlowRunFailed if it fails."""
    report = out_dir / "report.json"
    command = [sys.executable, "-m", "bandloom", "run", str(flow.path), "--quiet", "--out", str(out_dir),
               "--report", str(report)] + [a for s in sets for a in ("--set", s)]
    if flow.hosts:
        command.append("--one-machine")      # a flow placed on hosts is measured with every block here
    began = time.monotonic()
    done = subprocess.run(command, stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE,
                          text=True)
    seconds = time.monotonic() - began
    if done.returncode != 0:
        tail = "\n".join(done.stderr.strip().splitlines()[-5:])
        raise FlowRunFailed(f"the flow did not run cleanly (exit status {done.returncode}):\n{tail}")
    summary = json.loads(report.read_text())
    blocks = summary["blocks"]
    input_samples = sum(blocks[inst.name]["samples_out"] for inst in flow.instances.values() if inst.cls.is_source)
    sinks = [blocks[inst.name] for inst in flow.instances.values() if not any(inst.outputs.values())]
    firsts = [b["first_samples_clock"] for b in sinks if b["first_samples_clock"] is not None]
    startup = max(firsts) - began if firsts and len(firsts) == len(sinks) else None
    return FlowRun(input_samples, seconds, startup, summary)


def _best(flow: Flow, sets: list[str], runs: int, progress: Callable[[str], None] | None, label: str, *,
          after_each: Callable[[], None]) -> FlowRun:
    """The fastest of ``runs`` runs of the flow; ``after_each`` is called after every run."""
    best: FlowRun | None = None
    for i in range(runs):
        if progress:
            progress(f"bench --flow: {label} run {i + 1}/{runs}")
        with tempfile.TemporaryDirectory(prefix="bandloom-bench-") as folder:
            run = measure_flow(flow, sets, out_dir=Path(folder))
        if best is None or run.seconds < best.seconds:
            best = run
        after_each()
    assert best is not None
    return best


def run_flow_bench(args: Namespace, out: TextIO, progress: Callable[[str], None] | None = None) -> int:
    registry = load_registry()
    base_sets = list(args.set or [])
    try:
        flow = load_flow(args.flow, registry, overrides=[parse_override(t) for t in base_sets])
    except FlowErrors as errors:
        for problem in errors.problems:
            print(str(problem), file=sys.stderr)
        return 1
    channelizers = [inst for inst in flow.instances.values() if inst.type_name == CHANNELIZER
                    and (feeder := inst.inputs.get("samples")) is not None
                    and flow.instances[feeder.source].cls.is_source]
    passes: dict[str, list[float]] = {inst.name: [] for inst in channelizers}

    def measure_baselines() -> None:      # one pass each after every run of the flow (see the module doc)
        for inst in channelizers:
            if progress:
                progress(f"bench --flow: {inst.name} in process")
            with tempfile.TemporaryDirectory(prefix="bandloom-bench-") as folder:
                passes[inst.name].append(in_process_rate(flow, inst, Path(folder)))
    try:
        short = _best(flow, base_sets, args.runs, progress, "short", after_each=measure_baselines)
        long = _best(flow, base_sets + _length_overrides(flow, args.lengthen), args.runs, progress, "long",
                     after_each=measure_baselines)
    except FlowRunFailed as failure:
        if progress:
            progress("")
        print(f"bandloom bench: {failure}", file=sys.stderr)
        return 1
    extra = long.input_samples - short.input_samples
    if long.seconds <= short.seconds:
        raise ValueError(f"the long run took {long.seconds:.2f} s, no longer than the short one ({short.seconds:.2f} s): "
                         f"start-up hides the flow's rate; make the flow longer (its sources' length, or --lengthen)")
    steady = extra / (long.seconds - short.seconds)
    # at least two passes (one after each length's runs): one pass right after the kernels' source changed
    # was once measured 25x slow
    baselines = {name: max(rates) for name, rates in passes.items()}
    if progress:
        progress("")
    per_sample = max(1, long.input_samples)
    blocks = []
    first_of_process: dict[int, str] = {}      # copies sharing a process report its CPU once, on the first
    for name, b in long.summary["blocks"].items():
        active = (b["last_report_clock"] or 0) - (b["first_samples_clock"] or 0)
        shared_with = first_of_process.setdefault(b["pid"], name)
        cpu = b["cpu_seconds"] - short.summary["blocks"][name]["cpu_seconds"]
        blocks.append({"block": name, "busy_seconds": b["busy_seconds"],
                       "busy_fraction": b["busy_seconds"] / active if active > 0 else None,
                       "cpu_ns_per_input_sample": cpu / extra * 1e9 if shared_with == name else None,
                       "process_of": shared_with})
    processes = len(first_of_process)
    links = []
    for link, counted in zip(flow.links, long.summary["links"]):
        links.append({"link": counted["link"],
                      "bytes_per_input_sample": counted["sent_samples"] * link.stream.row_bytes / per_sample,
                      "copied_bytes_per_input_sample": counted["copied_bytes"] / per_sample,
                      "messages": counted["sent_messages"],
                      "shared_memory_fraction": (counted.get("shared_memory_messages", 0)
                                                 / max(1, counted["sent_messages"]))})
    result: dict[str, Any] = {
        "flow": str(args.flow), "processes": processes,
        "short": {"input_samples": short.input_samples, "seconds": short.seconds, "startup_seconds": short.startup_seconds},
        "long": {"input_samples": long.input_samples, "seconds": long.seconds, "startup_seconds": long.startup_seconds},
        "steady_input_rate": steady,
        "in_process": {name: {"rate": rate, "ratio": steady / rate} for name, rate in baselines.items()},
        "blocks": blocks, "links": links,
    }
    if args.json:
        out.write(json.dumps(result, indent=2) + "\n")
        return 0
    out.write(render_rows(["run", "input samples", "seconds", "start-up s"], [
        [key, result[key]["input_samples"], round(result[key]["seconds"], 2),
         "-" if result[key]["startup_seconds"] is None else round(result[key]["startup_seconds"], 2)]
        for key in ("short", "long")]) + "\n\n")
    out.write(f"steady input rate: {engineering(steady, 'sps')} ({processes} processes)\n")
    for name, entry in result["in_process"].items():
        out.write(f"in-process {name} on the same data: {engineering(entry['rate'], 'sps')}; "
                  f"flow / in-process = {entry['ratio']:.2f}\n")
    cpu_total = sum(b["cpu_ns_per_input_sample"] or 0.0 for b in blocks)
    out.write("\n" + render_rows(["block", "busy s", "busy fraction", "CPU ns / input sample"], [
        [b["block"], round(b["busy_seconds"], 2), "-" if b["busy_fraction"] is None else round(b["busy_fraction"], 2),
         f"(in {b['process_of']}'s)" if b["cpu_ns_per_input_sample"] is None else round(b["cpu_ns_per_input_sample"], 1)]
        for b in blocks] + [["(all)", "", "", round(cpu_total, 1)]]) + "\n")
    out.write(f"{len(os.sched_getaffinity(0))} cores give {engineering(len(os.sched_getaffinity(0)) * 1e9 / cpu_total, 'sps')} "
              f"at {cpu_total:.1f} ns of CPU per input sample, if nothing else waited.\n\n")
    out.write(render_rows(["link", "messages", "through shared memory", "bytes / input sample",
                           "copied bytes / input sample"], [
        [x["link"], x["messages"], f"{x['shared_memory_fraction']:.0%}", round(x["bytes_per_input_sample"], 2),
         round(x["copied_bytes_per_input_sample"], 2)] for x in links]) + "\n")
    out.write("Steady rate: the long run's extra samples over its extra seconds; start-up: from the command to "
              "the first samples at every sink (short run). Each byte that goes through a socket (not shared "
              "memory) is copied twice more by the kernel.\n")
    return 0
