"""``bandloom bench``: bank throughput as a ratio to a bare FFT measured in the same run.

For every (M, R, oversampling) the same random complex64 input is streamed
through the bank in chunks of ``--chunk`` samples, as the runtime would, and
the same frames (already cut out and laid out contiguously, so the baseline
does no polyphase work and no allocation at all) are transformed chunk by
chunk in place with ``scipy.fft.fft`` (``ifft`` for synthesis), one worker
thread. Each figure is the best of ``--repeats`` runs; bank and baseline
alternate within each repeat so that load from elsewhere hits both alike.
Ratios, not seconds, are the figures to compare between machines.
"""

from __future__ import annotations

import json
import sys
import time
from argparse import ArgumentParser, Namespace
from collections.abc import Callable
from typing import Any, TextIO

import numpy as np
from bandloom.blocks.text_tables import render_rows

from ._memory import reuse_chunk_buffers
from .arguments import whole_number, whole_numbers

__all__ = ["add_arguments", "measure_case", "run"]


def add_arguments(parser: ArgumentParser) -> None:
    parser.add_argument("--channels", type=whole_numbers(2, 1 << 16), default=[64, 1024, 4096],
                        help="comma list of M")
    parser.add_argument("--taps-per-branch", type=whole_numbers(1, 256), default=[4, 8, 16], help="comma list of R")
    parser.add_argument("--oversample", type=whole_numbers(1, 1 << 16), default=[1, 2], help="comma list of M/D")
    parser.add_argument("--samples", type=whole_number(1, 1 << 30), default=1 << 21, help="input samples per case")
    parser.add_argument("--chunk", type=whole_number(1, 1 << 26), default=1 << 16, help="samples per process() call")
    parser.add_argument("--repeats", type=whole_number(1, 1000), default=5, help="best of this many runs")
    parser.add_argument("--threads", type=whole_number(1, 64), default=1, help="also time both banks with this many threads "
                        "against one (they pay off with --chunk 262144 or more)")
    parser.add_argument("--json", action="store_true", help="print the results as JSON")
    flows = parser.add_argument_group("a whole flow (docs/performance.md)")
    flows.add_argument("--flow", help="measure this flow file instead of the banks: steady rate, start-up, the "
                       "ratio to its channelizer in process, busy fraction per block, bytes per link")
    flows.add_argument("--set", action="append", default=[], metavar="BLOCK.KEY=VALUE",
                       help="with --flow: override a block parameter, as for 'bandloom run'")
    flows.add_argument("--lengthen", type=whole_number(2, 1000), default=4, help="with --flow: the long run is "
                       "this many times the short one (2 to 1000; default 4)")
    flows.add_argument("--runs", type=whole_number(1, 20), default=2, help="with --flow: runs of each length, the "
                       "fastest counts (1 to 20; default 2)")


def _best(function: Callable[[], object], repeats: int) -> float:
    best = float("inf")
    for _ in range(repeats):
        start = time.perf_counter()
        function()
        best = min(best, time.perf_counter() - start)
    return best


def measure_case(channels: int, taps_per_branch: int, oversample: int, *, samples: int, chunk: int, repeats: int,
                 seed: int = 0, threads: int = 1) -> dict[str, Any]:
    """Time one case; return a dict of throughputs and ratios."""
    import scipy.fft
    from bandloom.blocks.dsp import AnalysisBank, SynthesisBank, cost_ratio

    M, R = channels, taps_per_branch
    D = M // oversample
    rng = np.random.default_rng(seed)
    samples = max(samples // M, 2 * R) * M
    chunk = max(D, chunk // D * D)
    x = (rng.standard_normal(samples) + 1j * rng.standard_normal(samples)).astype(np.complex64)
    taps = rng.standard_normal(R * M)
    pieces = [x[i:i + chunk] for i in range(0, samples, chunk)]
    analysis = AnalysisBank(M, D, taps)
    synthesis = SynthesisBank(M, D, taps)
    shared = AnalysisBank(M, D, taps, threads=threads), SynthesisBank(M, D, taps, threads=threads)
    frames: list[np.ndarray] = []

    def run_analysis() -> None:
        analysis.reset()
        frames[:] = [analysis.process(p) for p in pieces]

    def run_synthesis() -> None:
        synthesis.reset()
        for f in frames:
            synthesis.process(f)

    def run_threaded() -> None:           # both banks with ``threads`` threads, on the same chunks
        shared[0].reset()
        shared[1].reset()
        for p in pieces:
            shared[1].process(shared[0].process(p))

    def run_both() -> None:               # the same with one thread, to compare with run_threaded
        analysis.reset()
        synthesis.reset()
        for p in pieces:
            synthesis.process(analysis.process(p))

    run_analysis()                                  # warm up (numba cache load, page faults)
    run_synthesis()
    # The baseline's frames: the same input cut into M-sample frames every D samples, chunk by chunk.
    padded = np.concatenate([x, np.zeros(M, np.complex64)])
    cut = np.lib.stride_tricks.sliding_window_view(padded, M)[::D]
    starts = np.cumsum(np.array([0] + [len(f) for f in frames]))
    forward = [np.ascontiguousarray(cut[a:b]) for a, b in zip(starts[:-1], starts[1:])]
    inverse = [f.copy() for f in frames]
    scratch = {"fft": [f.copy() for f in forward], "ifft": [f.copy() for f in inverse]}

    def run_fft() -> None:
        for w in scratch["fft"]:
            scipy.fft.fft(w, axis=1, workers=1, overwrite_x=True)

    def run_ifft() -> None:
        for w in scratch["ifft"]:
            scipy.fft.ifft(w, axis=1, workers=1, overwrite_x=True)

    cases: list[tuple[str, Callable[[], None], list[np.ndarray] | None]] = [
        ("analysis", run_analysis, None), ("fft", run_fft, forward),
        ("synthesis", run_synthesis, None), ("ifft", run_ifft, inverse)]
    if threads > 1:
        run_threaded()
        cases += [("one thread", run_both, None), ("threads", run_threaded, None)]
    best = dict.fromkeys([name for name, _, _ in cases], float("inf"))
    for _ in range(repeats):
        for name, function, source in cases:
            if source is not None:                  # fresh input for the in-place transforms, untimed
                for target, original in zip(scratch[name], source):
                    np.copyto(target, original)
            best[name] = min(best[name], _best(function, 1))
    t_analysis, t_fft, t_synthesis, t_ifft = best["analysis"], best["fft"], best["synthesis"], best["ifft"]
    return {
        "channels": M, "taps_per_branch": R, "oversample": oversample, "decimation": D,
        "analysis_msps": samples / t_analysis / 1e6,
        "analysis_ratio": t_analysis / t_fft,
        "synthesis_msps": samples / t_synthesis / 1e6,
        "synthesis_ratio": t_synthesis / t_ifft,
        "model_ratio": float(cost_ratio(R, M)),
        "threads": threads,
        "thread_speedup": best["one thread"] / best["threads"] if threads > 1 else None,
    }


def run(args: Namespace, out: TextIO, progress: Callable[[str], None] | None = None) -> int:
    if args.flow:
        from .flow_bench import run_flow_bench
        return run_flow_bench(args, out, progress)
    reuse_chunk_buffers()
    results = []
    cases = [(m, r, p) for m in args.channels for r in args.taps_per_branch for p in args.oversample]
    skipped = sorted({(m, p) for m, _, p in cases if m % p})
    if len(skipped) == len({(m, p) for m, _, p in cases}):
        print(f"bandloom bench: no case to measure: M/D must divide M ({', '.join(f'M/D = {p} for M = {m}' for m, p in skipped)})",
              file=sys.stderr)
        return 2
    for i, (m, r, p) in enumerate(cases):
        if m % p:
            continue
        if progress:
            progress(f"bench {i + 1}/{len(cases)}: M={m} R={r} M/D={p}")
        results.append(measure_case(m, r, p, samples=args.samples, chunk=args.chunk, repeats=args.repeats,
                                    threads=args.threads))
    if progress:
        progress("")                  # the progress line is cleared before any result is written
    if args.json:
        out.write(json.dumps(results, indent=2) + "\n")
        return 0
    headers = ["M", "R", "M/D", "analysis Msamples/s", "analysis / FFT", "synthesis Msamples/s",
               "synthesis / IFFT", "model 1+R/log2 M"]
    rows = [[r["channels"], r["taps_per_branch"], r["oversample"], round(r["analysis_msps"], 1),
             round(r["analysis_ratio"], 2), round(r["synthesis_msps"], 1), round(r["synthesis_ratio"], 2),
             round(r["model_ratio"], 2)] for r in results]
    if args.threads > 1:
        headers.append(f"{args.threads} threads / 1")
        for row, r in zip(rows, results):
            row.append(round(r["thread_speedup"], 2))
    out.write(render_rows(headers, rows) + "\n")
    out.write("Ratios are bank time over a bare scipy.fft of the same frames, same run, one core.\n")
    if skipped:
        out.write("Not measured (M/D must divide M): " + ", ".join(f"M = {m}, M/D = {p}" for m, p in skipped) + ".\n")
    if args.threads > 1:
        out.write(f"'{args.threads} threads / 1': throughput of analysis then synthesis with threads = {args.threads} "
                  f"over one thread, same chunks, same run (identical output).\n")
    return 0
