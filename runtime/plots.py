"""Pictures for the design and verification commands (matplotlib, the 'plots' extra)."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
from bandloom.blocks.dsp.design import BankDesign
from bandloom.blocks.dsp.verification import SignalResult, ToneMeasurement

__all__ = ["design_picture", "round_trip_picture"]


def _pyplot() -> Any:
    try:
        import matplotlib
    except ImportError:
        raise ValueError("pictures need matplotlib: pip install 'bandloom[plots]'") from None
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    return plt


def design_picture(design: BankDesign, path: str | Path, measured: ToneMeasurement | None = None) -> None:
    """Prototype response with the channel grid and figures; a channel overlaid on its neighbours."""
    from bandloom.blocks.dsp.figures import frequency_response

    plt = _pyplot()
    f = design.figures()
    offsets, response = frequency_response(design.analysis_taps, design.channels, points_per_channel=128)
    level = 20 * np.log10(np.maximum(np.abs(response), 1e-12))
    span = min(design.channels / 2, 4.0)
    keep = np.abs(offsets) <= span
    fig, (top, bottom) = plt.subplots(2, 1, figsize=(13, 8.5), dpi=100)
    top.plot(offsets[keep], level[keep], color="tab:blue", linewidth=1.2, label="computed from the taps")
    if measured is not None:
        near = np.abs(measured.offsets) <= span
        top.plot(measured.offsets[near], measured.level_db[near], ".", markersize=2.5, color="tab:red",
                 label="measured with tones (complex64 bank)")
    for edge in np.arange(-np.floor(span) - 0.5, span + 0.51, 1.0):
        top.axvline(edge, color="grey", alpha=0.35, linewidth=0.8)
    top.axhline(-f["adjacent_rejection_db"], color="tab:orange", linestyle="--", linewidth=1,
                label="adjacent-channel rejection")
    top.legend(loc="lower center", bbox_to_anchor=(0.5, -0.3), ncol=3, frameon=False)
    top.set_ylim(max(level[keep].min(), -180), 5)
    top.set_xlim(-span, span)
    top.set_xlabel("frequency from the channel centre (channel spacings; grey: channel edges)")
    top.set_ylabel("response (dB)")
    top.set_title(f"{design.channels} channels, decimation {design.decimation} ({design.shape}, "
                  f"{f['taps']} taps = {f['taps_per_branch']:.2f} per branch)")
    text = "\n".join([
        f"adjacent-channel rejection {f['adjacent_rejection_db']:.1f} dB",
        f"flat-part ripple {f['passband_ripple_db']:.3f} dB (|f| <= {f['passband_edge']:.2f})",
        f"-3 dB edge {f['edge_3db']:.3f}", f"scalloping {f['scalloping_loss_db']:.2f} dB",
        f"ENBW {f['enbw_bins']:.3f} bins", f"round trip {f['round_trip_error_db']:.1f} dB",
        f"cost {f['cost_ratio']:.2f} x bare FFT (1 + R/log2 M)"])
    # beside the plots, never over a curve or a measured point
    fig.text(0.755, 0.96, "figures of the design\n\n" + text, fontsize=9, family="monospace",
             va="top", bbox=dict(facecolor="white", edgecolor="grey"))
    # a channel and its neighbours, linear power, to show how they overlap
    near = np.abs(offsets) <= 3.0
    for k, colour in zip((-2, -1, 0, 1, 2), ("0.6", "0.35", "tab:blue", "0.35", "0.6")):
        bottom.plot(offsets[near] + k, np.abs(response[near]) ** 2, color=colour, linewidth=1.5 if k == 0 else 1)
    total = sum(np.interp(offsets[near], offsets[near] + k, np.abs(response[near]) ** 2, left=0, right=0)
                for k in range(-3, 4))
    bottom.plot(offsets[near], total, color="tab:green", linestyle="--", label="sum of all channels' power")
    bottom.set_xlim(-2.5, 2.5)
    bottom.set_xlabel("frequency (channel spacings)")
    bottom.set_ylabel("power response")
    bottom.set_title("channel 0 (blue) over its neighbours")
    bottom.legend(loc="lower center", bbox_to_anchor=(0.5, -0.32), frameon=False)
    fig.tight_layout(rect=(0, 0, 0.75, 1))
    fig.savefig(path)
    plt.close(fig)


def round_trip_picture(results: list[SignalResult], design_label: str, path: str | Path) -> None:
    """The round trip's error spectrum for each test signal, against the input's."""
    plt = _pyplot()
    fig, axes = plt.subplots(len(results), 1, figsize=(10, 2.6 * len(results)), dpi=100, sharex=True)
    axes = np.atleast_1d(axes)
    for ax, r in zip(axes, results):
        freqs, ref_db, err_db = r.spectrum
        step = max(1, len(freqs) // 8000)
        ax.plot(freqs[::step], ref_db[::step], color="0.6", linewidth=0.6, label="input")
        ax.plot(freqs[::step], err_db[::step], color="tab:red", linewidth=0.6, label="output - input")
        ax.set_ylabel("dB")
        ax.set_ylim(-200, 5)
        ax.set_title(f"{r.signal}: error {r.error_db:.1f} dB, delay {r.delay}", fontsize=10)
    axes[-1].set_xlabel("frequency (channel spacings from the band centre)")
    fig.suptitle(f"round trip error spectrum: {design_label}")
    handles, labels = axes[0].get_legend_handles_labels()
    fig.legend(handles, labels, loc="upper center", bbox_to_anchor=(0.5, 0.975), ncol=2, fontsize=9,
               frameon=False)                          # under the title, above the panels, never on the data
    fig.tight_layout(rect=(0, 0, 1, 0.955))
    fig.savefig(path)
    plt.close(fig)
