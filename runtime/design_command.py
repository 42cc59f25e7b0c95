"""``bandloom design``: design a matched bank and print its figures."""

from __future__ import annotations

import json
from argparse import ArgumentParser, Namespace
from pathlib import Path
from typing import Any, TextIO

import numpy as np
from bandloom.blocks.dsp import design_bank
from bandloom.blocks.dsp.design import SHAPES, BankDesign
from bandloom.blocks.text_tables import render_pairs

__all__ = ["add_arguments", "add_design_arguments", "describe", "design_from_args", "run"]


def add_design_arguments(parser: ArgumentParser, *, required: bool = True) -> None:
    """The design knobs, shared by design, roundtrip and channel-quality."""
    parser.add_argument("--channels", type=int, required=required, help="number of channels M")
    group = parser.add_mutually_exclusive_group()
    group.add_argument("--oversample", type=int, help="oversampling M/D (default 2)")
    group.add_argument("--decimation", type=int, help="decimation D (divides M)")
    parser.add_argument("--shape", choices=SHAPES, help="prototype shape (default: root-raised-cosine "
                        "when oversampled, low-pass when critically sampled)")
    parser.add_argument("--taps-per-branch", type=int, help="prototype length in multiples of M")
    parser.add_argument("--rolloff", type=float, help="root-raised-cosine rolloff, 0.05..1 (default 0.5)")
    parser.add_argument("--stopband-db", type=float, help="attenuation the Kaiser window is designed for, dB")
    parser.add_argument("--tight-margin", type=int, help="branches either side the tight window may spread "
                        "into (root-raised-cosine; default 2)")
    parser.add_argument("--window", default="kaiser", help="window name scipy.signal.get_window knows "
                        "(default kaiser, set by --stopband-db)")


def add_arguments(parser: ArgumentParser) -> None:
    add_design_arguments(parser)
    parser.add_argument("--json", action="store_true", help="print the figures as JSON")
    parser.add_argument("--plot", metavar="FILE", help="draw the response with the channel grid and figures (PNG)")
    parser.add_argument("--taps", metavar="FILE", help="save the analysis taps (.npy binary, else text)")
    parser.add_argument("--synthesis-taps", metavar="FILE", help="save the synthesis taps (.npy binary, else text)")


def _save_taps(path: str | Path, taps: np.ndarray, header: str) -> None:
    path = Path(path)
    if path.suffix == ".npy":
        np.save(path, taps)
    else:
        np.savetxt(path, taps, fmt="%.17g", header=header)


def design_from_args(args: Namespace) -> BankDesign:
    return design_bank(args.channels, args.decimation, oversample=args.oversample, shape=args.shape,
                       taps_per_branch=args.taps_per_branch, rolloff=args.rolloff,
                       stopband_db=args.stopband_db, window=args.window, tight_margin=args.tight_margin)


def describe(design: BankDesign) -> list[tuple[str, Any, str]]:
    """The figures as (label, value, unit) rows for the table."""
    f = design.figures()
    return [
        ("channels", f["channels"], ""),
        ("decimation", f["decimation"], f"(oversampling {f['oversampling']})"),
        ("shape", f["shape"], f"({'tight, ' if f['tight'] else ''}window {f['window']})"),
        ("taps", f["taps"], f"({f['taps_per_branch']:.3f} per branch)"),
        ("passband ripple", f["passband_ripple_db"], f"dB over |f| <= {f['passband_edge']:.3g} spacing"),
        ("-3 dB edge", f["edge_3db"], "channel spacings from centre"),
        ("-6 dB edge", f["edge_6db"], "channel spacings from centre"),
        ("adjacent-channel rejection", f["adjacent_rejection_db"], "dB (|f| >= 1 spacing)"),
        ("alternate-channel rejection", f["alternate_rejection_db"], "dB (|f| >= 2 spacings)"),
        ("highest sidelobe", f["highest_sidelobe_db"], "dB"),
        ("scalloping loss", f["scalloping_loss_db"], "dB (tone at a channel edge)"),
        ("equivalent noise bandwidth", f["enbw_bins"], "channel spacings"),
        ("frame bounds A, B", f"{f['frame_bound_a']:.6g}, {f['frame_bound_b']:.6g}",
         f"(B/A = {f['frame_condition']:.6g})"),
        ("round-trip delay", f["delay_samples"], "samples"),
        ("round-trip error", f["round_trip_error_db"], "dB relative RMS, white input, float64"),
        ("cost vs bare FFT (model)", f["cost_ratio"], "x  (1 + R/log2 M)"),
        ("multiplies per input sample", f["multiplies_per_input_sample"], ""),
    ]


def run(args: Namespace, out: TextIO) -> int:
    design = design_from_args(args)
    if args.taps:
        _save_taps(args.taps, design.analysis_taps, f"bandloom analysis taps: {design!r}")
    if args.synthesis_taps:
        _save_taps(args.synthesis_taps, design.synthesis_taps, f"bandloom synthesis taps: {design!r}")
    if args.plot:
        from .plots import design_picture
        design_picture(design, args.plot)
    if args.json:
        out.write(json.dumps(design.figures(), indent=2) + "\n")
    else:
        out.write(render_pairs(describe(design)) + "\n")
    return 0
