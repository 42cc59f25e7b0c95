"""Pure numeric kernels: polyphase banks, bank design, response figures.

Importable on its own (numpy, scipy, numba only). Conventions are stated once
in :mod:`bandloom.blocks.dsp.banks`. Names are imported on first use, so that a
process that needs only part of the package (a block process, say) does not
pay for loading scipy.signal and numba.
"""

from importlib import import_module
from typing import Any

_WHERE = {
    "AnalysisBank": "banks", "SynthesisBank": "banks", "channel_offsets": "banks", "signed_channel": "banks",
    "BankDesign": "design", "design_bank": "design",
    "ResponseFigures": "figures", "cost_ratio": "figures", "frequency_response": "figures",
    "response_figures": "figures",
    "dual_window": "frames", "frame_bounds": "frames", "round_trip_transfer": "frames", "tight_window": "frames",
}

__all__ = sorted(_WHERE)


def __getattr__(name: str) -> Any:
    if name in _WHERE:
        value = getattr(import_module(f".{_WHERE[name]}", __name__), name)
        globals()[name] = value
        return value
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")


def __dir__() -> list[str]:
    return __all__
