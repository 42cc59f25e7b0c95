"""``bandloom roundtrip`` and ``bandloom channel-quality``: measure a bank with test signals.

Both take a design (the same knobs as ``bandloom design``) or a flow file
(``--flow``), whose channelizer (and the synthesis it feeds, if any) is
measured. ``roundtrip --flow`` runs the test signals through real block
processes: a flow of its own is made with the flow's channelizer and
synthesis settings, an IQ reader per test signal and an IQ writer per output.
"""

from __future__ import annotations

import json
import sys
import tempfile
from argparse import ArgumentParser, Namespace
from pathlib import Path
from typing import Any, TextIO

import numpy as np
from bandloom.blocks.dsp.banks import signed_channel
from bandloom.blocks.dsp.design import BankDesign
from bandloom.blocks.dsp.verification import (
    SIGNALS,
    SignalResult,
    analyse_round_trip,
    measure_channel_response,
    probe_signal,
    round_trip_in_process,
)
from bandloom.blocks.text_tables import render_rows

from .arguments import number_between, whole_number
from .design_command import add_design_arguments, design_from_args
from .flow import FlowErrors, check_flow, load_flow
from .plugins import load_registry
from .terminal import progress

__all__ = [
    "add_quality_arguments", "add_roundtrip_arguments", "measurement_flow", "round_trip_through_processes",
    "run_quality", "run_roundtrip"
]


def _common(parser: ArgumentParser) -> None:
    add_design_arguments(parser, required=False)
    parser.add_argument("--flow", help="measure this flow's channelizer (and synthesis) instead of a design")
    parser.add_argument("--json", action="store_true", help="print the figures as JSON")
    parser.add_argument("--plot", metavar="FILE", help="draw the figures (PNG)")


def add_roundtrip_arguments(parser: ArgumentParser) -> None:
    _common(parser)
    parser.add_argument("--threshold", type=number_between(-400, 0, "dB"), default=-100.0,
                        help="PASS when every signal's error is at or below this, dB (default -100)")
    parser.add_argument("--signals", default=",".join(SIGNALS), help=f"comma list of {', '.join(SIGNALS)}")
    parser.add_argument("--frames", type=whole_number(1, 4096), default=64,
                        help="length of each test signal in frames of M (1 to 4096)")


def add_quality_arguments(parser: ArgumentParser) -> None:
    _common(parser)
    parser.add_argument("--steps", type=whole_number(1, 1024), default=32, help="tones per channel spacing (1 to 1024)")


class _FlowBank:
    """What a flow's channelizer is: its parameters, input rate and centre, and its design."""

    def __init__(self, flow_path: str | Path) -> None:
        from bandloom.blocks._bank_params import DESIGN_KEYS, make_design
        try:
            flow = load_flow(flow_path, load_registry())
        except FlowErrors as errors:
            raise ValueError("the flow has problems (run 'bandloom check'):\n" + str(errors)) from None
        splits = [i for i in flow.instances.values() if i.type_name == "channelizer"]
        if len(splits) != 1:
            raise ValueError(f"{flow_path} has {len(splits)} channelizer blocks; --flow needs exactly one")
        self.split = splits[0]
        self.merge = next((i for i in flow.instances.values() if i.type_name == "synthesis"
                           and i.inputs.get("channels") and i.inputs["channels"].source == self.split.name), None)
        wide = self.split.input_streams["samples"]
        self.rate, self.centre = wide.sample_rate, wide.centre_frequency
        # the channels the flow links from its channelizer to its synthesis (None: every one)
        self.selected: list[int] | None = None
        if self.merge is not None:
            link = self.merge.inputs["channels"]
            if link.columns is not None and len(link.columns) < self.split.params["channels"]:
                channels = self.split.output_streams["channels"].channels
                self.selected = [channels[c] for c in link.columns]
        self.design = make_design(self.split.params["channels"], self.split.params["oversample"],
                                  {k: self.split.params.get(k) for k in DESIGN_KEYS})
        self.label = f"{flow_path}: block {self.split.name!r}"


def _target(args: Namespace) -> _FlowBank | None:
    if args.flow:
        return _FlowBank(args.flow)
    if args.channels is None:
        raise ValueError("give --channels (with design knobs) or --flow FLOW")
    return None


def _without_unset(params: dict[str, Any]) -> dict[str, Any]:
    return {k: v for k, v in params.items() if v is not None}


def measurement_flow(target: _FlowBank, signals: list[str]) -> dict[str, Any]:
    """A flow (as the mapping a flow file gives) that runs each signal through its own copy of the
    target's channelizer and synthesis: ``NAME.cf32`` in, ``NAME-out.cf32`` out."""
    blocks: dict[str, Any] = {}
    links: list[dict[str, Any]] = []
    split_params = _without_unset(target.split.params)
    merge_params = _without_unset(target.merge.params) if target.merge else {}
    merge_params["output"] = "band"     # a group's own-rate output holds the same channels; compare at full rate
    for name in signals:
        blocks[f"{name}-in"] = {"type": "iq-reader", "path": f"{name}.cf32", "sample_rate": target.rate,
                                "centre_frequency": target.centre, "metadata": "none"}
        blocks[f"{name}-split"] = {"type": "channelizer", **split_params}
        blocks[f"{name}-merge"] = {"type": "synthesis", **merge_params}
        blocks[f"{name}-out"] = {"type": "iq-writer", "path": f"{name}-out.cf32", "metadata": False}
        links.append({"from": f"{name}-in.samples", "to": f"{name}-split.samples"})
        links.append({"from": f"{name}-split.channels", "to": f"{name}-merge.channels",
                      **({"select": target.selected} if target.selected is not None else {})})
        links.append({"from": f"{name}-merge.samples", "to": f"{name}-out.samples"})
    return {"flow": {"name": "roundtrip measurement"}, "blocks": blocks, "links": links}


def round_trip_through_processes(target: _FlowBank, signals: list[str], frames: int,
                                 folder: str | Path) -> tuple[list[SignalResult], int]:
    """Run the signals through real channelizer and synthesis processes; (results, processes used)."""
    from .supervisor import RunOutcome, Supervisor

    design = target.design
    length = max(frames * design.channels, 1 << 14) + 2 * design.delay
    folder = Path(folder)
    inputs = {}
    for name in signals:
        x = probe_signal(name, length, design.channels)
        x.tofile(folder / f"{name}.cf32")
        inputs[name] = x
    flow = check_flow(measurement_flow(target, signals), load_registry(), path=folder / "roundtrip.toml",
                      output_dir=folder)
    supervisor = Supervisor(flow, output_dir=folder, quiet=True)
    if supervisor.run() is not RunOutcome.FINISHED:
        raise ValueError("the measurement flow did not finish:\n" + json.dumps(supervisor.summary()["blocks"], indent=1))
    pids = {r.pid for r in supervisor.blocks.values()}
    results = []
    for name in signals:
        y = np.fromfile(folder / f"{name}-out.cf32", np.complex64)
        results.append(analyse_round_trip(name, inputs[name], y, design.channels, expected_delay=design.delay,
                                          decimation=design.decimation))
    return results, len(pids)


def interior_channels(selected: list[int], channels: int) -> list[int]:
    """Of a merged group of channels, those between its outer two in frequency: a group reconstructs
    exactly only between the outer channels' centres (their outer halves lack a neighbour).

    >>> interior_channels([14, 15, 0, 1, 2], 16)
    [15, 0, 1]
    """
    return sorted(selected, key=lambda k: signed_channel(k, channels))[1:-1]


def _worst_of(result: SignalResult, judged: list[int] | None) -> tuple[int, float]:
    if judged is None:
        return result.worst_channel()
    k = max(judged, key=lambda c: result.band_error_db[c])
    return k, float(result.band_error_db[k])


def _why(result: SignalResult, design: BankDesign, judged: list[int] | None = None) -> tuple[int, float, str]:
    k, level = _worst_of(result, judged)
    floor = design.round_trip_error_db
    if level <= floor + 9:
        return k, level, (f"within 9 dB of the design's predicted floor ({floor:.1f} dB, float64); "
                          f"the rest is complex64 rounding")
    return k, level, f"{level - floor:.1f} dB above the design's predicted floor ({floor:.1f} dB): see the error spectrum (--plot)"


#: The most samples of one test signal (--frames x M), and of tones x M for channel-quality: 16 Mi, well
#: past what a figure needs, and within memory whatever M is (a signal is complex128 here).
MAX_TEST_SAMPLES = 1 << 24


def _check_size(option: str, value: int, channels: int) -> None:
    if value * channels > MAX_TEST_SAMPLES:
        raise ValueError(f"{option} {value} x M = {channels} channels is {value * channels}, more than "
                         f"{MAX_TEST_SAMPLES}; give at most {max(1, MAX_TEST_SAMPLES // channels)}")


def run_roundtrip(args: Namespace, out: TextIO, log: TextIO | None = None) -> int:
    log = log or sys.stderr
    target = _target(args)
    signals = [s.strip() for s in args.signals.split(",") if s.strip()]
    for s in signals:
        if s not in SIGNALS:
            raise ValueError(f"--signals: {s!r} is not one of {', '.join(SIGNALS)}")
    processes = None
    design = design_from_args(args) if target is None else target.design
    _check_size("--frames", args.frames, design.channels)
    if target is None:
        label = f"design M={design.channels} D={design.decimation} ({design.shape})"
        results = []
        for number, signal in enumerate(signals, 1):
            progress(f"roundtrip: {signal} ({number} of {len(signals)}) through M={design.channels}")
            results += round_trip_in_process(design, [signal], frames=args.frames)
        progress("")
        where = "in process"
    else:
        label = target.label
        progress(f"roundtrip: {', '.join(signals)} through the flow's blocks as processes")
        with tempfile.TemporaryDirectory(prefix="bandloom-roundtrip-") as folder:
            results, processes = round_trip_through_processes(target, signals, args.frames, folder)
        progress("")
        where = f"through {processes} block processes"
    selected = target.selected if target is not None else None
    judged = interior_channels(selected, design.channels) if selected is not None else None
    if judged is not None and not judged:
        raise ValueError(f"the flow merges {len(selected or [])} channels ({selected}): a group needs 3 or more "
                         f"for a channel between its outer two, the only ones it reconstructs exactly")
    errors = [_worst_of(r, judged)[1] if judged is not None else r.error_db for r in results]
    worst = max(errors)
    passed = worst <= args.threshold
    report = {"design": label, "where": where, "channels": design.channels, "decimation": design.decimation,
              "design_delay": design.delay, "predicted_error_db": design.round_trip_error_db,
              "threshold_db": args.threshold, "pass": passed, "channels_merged": selected,
              "channels_judged": judged, "signals": []}
    for r, error in zip(results, errors):
        k, level, why = _why(r, design, judged)
        report["signals"].append({
            "signal": r.signal, "error_db": round(error, 2), "whole_band_error_db": round(r.error_db, 2),
            "delay_samples": r.delay,
            "delay_matches_design": r.delay == design.delay, "gain_db": round(r.gain_db, 6),
            "phase_degrees": round(r.phase_degrees, 6), "error_after_gain_and_phase_db": round(r.error_after_gain_db, 2),
            "worst_channel": k, "worst_channel_error_db": round(level, 2), "worst_channel_why": why,
            "spurs_away_from_tones_db": None if r.spur_db is None else round(r.spur_db, 2),
            "alias_image_level_db": None if r.alias_db is None else round(r.alias_db, 2),
            "band_error_db": [round(float(v), 2) for v in r.band_error_db]})
    if args.plot:
        from .plots import round_trip_picture
        round_trip_picture(results, label, args.plot)
    if args.json:
        out.write(json.dumps(report, indent=2) + "\n")
    else:
        out.write(f"round trip of {label}, {where}\n")
        if judged is not None:
            out.write(f"the flow merges channels {', '.join(map(str, selected or []))}; errors are those of the "
                      f"channels between the outer two ({', '.join(map(str, judged))}), the part a group "
                      f"reconstructs exactly\n")
        out.write(f"design delay {design.delay} samples; predicted error {design.round_trip_error_db:.1f} dB "
                  f"(float64, white input)\n\n")
        rows: list[list[Any]] = []
        for sig in report["signals"]:
            other = []
            if sig["spurs_away_from_tones_db"] is not None:
                other.append(f"spurs {sig['spurs_away_from_tones_db']:.1f} dB")
            if sig["alias_image_level_db"] is not None:
                other.append(f"aliases/images {sig['alias_image_level_db']:.1f} dB")
            rows.append([sig["signal"], f"{sig['error_db']:.1f}", sig["delay_samples"], f"{sig['gain_db']:+.6f}",
                         f"{sig['phase_degrees']:+.5f}", sig["worst_channel"], f"{sig['worst_channel_error_db']:.1f}",
                         ", ".join(other)])
        out.write(render_rows(["signal", "error dB", "delay", "gain dB", "phase deg", "worst channel", "its error",
                               "other"], rows) + "\n")
        worst_signal = max(report["signals"], key=lambda s: s["worst_channel_error_db"])
        out.write(f"\nworst channel: {worst_signal['worst_channel']} ({worst_signal['signal']}), "
                  f"{worst_signal['worst_channel_error_db']:.1f} dB: {worst_signal['worst_channel_why']}\n")
        out.write(f"{'PASS' if passed else 'FAIL'}: worst error {worst:.1f} dB against the threshold "
                  f"{args.threshold:g} dB\n")
    return 0 if passed else 1


def run_quality(args: Namespace, out: TextIO, log: TextIO | None = None) -> int:
    target = _target(args)
    design = target.design if target else design_from_args(args)
    label = target.label if target else f"design M={design.channels} D={design.decimation} ({design.shape})"
    _check_size("--steps", args.steps, design.channels)
    measured = measure_channel_response(design.analysis_bank, design.channels, steps_per_spacing=args.steps)
    got = measured.figures(design.passband_edge)
    computed = design.response
    expected = {
        "passband_ripple_db": computed.passband_ripple_db,
        "edge_response_db": -computed.scalloping_loss_db,
        "scalloping_loss_db": computed.scalloping_loss_db,
        "adjacent_rejection_db": computed.adjacent_rejection_db,
        "alternate_rejection_db": computed.alternate_rejection_db,
        "alias_rejection_db": _alias_from_taps(design),
        "enbw_bins": computed.enbw_bins,
    }
    rows: list[dict[str, Any]] = []
    for key, title in (("passband_ripple_db", f"flat-part ripple (|f| <= {design.passband_edge:.2f}), dB"),
                       ("edge_response_db", "response at the channel edge, dB"),
                       ("scalloping_loss_db", "scalloping loss across the channel, dB"),
                       ("adjacent_rejection_db", "adjacent-channel rejection (|f| >= 1), dB"),
                       ("alternate_rejection_db", "alternate-channel rejection (|f| >= 2), dB"),
                       ("alias_rejection_db", f"alias/image rejection at decimation {design.decimation}, dB"),
                       ("enbw_bins", "equivalent noise bandwidth, bins")):
        rows.append({"figure": key, "what": title, "measured": round(got[key], 4),
                     "from_taps": round(float(expected[key]), 4),
                     "difference": round(got[key] - float(expected[key]), 4)})
    if args.plot:
        from .plots import design_picture
        design_picture(design, args.plot, measured=measured)
    if args.json:
        out.write(json.dumps({"design": label, "steps_per_spacing": args.steps, "figures": rows}, indent=2) + "\n")
        return 0
    out.write(f"channel quality of {label}, measured with {args.steps} tones per channel spacing through the "
              f"complex64 bank, against the figures computed from the taps\n\n")
    table = [[r["what"], f"{r['measured']:.3f}", f"{r['from_taps']:.3f}", f"{r['difference']:+.3f}"] for r in rows]
    out.write(render_rows(["figure", "measured", "from taps", "difference"], table) + "\n")
    return 0


def _alias_from_taps(design: BankDesign) -> float:
    """Worst response at |f| >= M/D - 1/2 spacings: what folds into the passband after decimation."""
    from bandloom.blocks.dsp.figures import frequency_response
    offsets, response = frequency_response(design.analysis_taps, design.channels)
    p = design.oversampling
    far = np.abs(offsets) >= p - 0.5
    return float(-20 * np.log10(np.max(np.abs(response[far])))) if far.any() else float("inf")
