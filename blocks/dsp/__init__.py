"""Pure numeric kernels: polyphase banks, bank design, response figures.

Importable on its own (numpy, scipy, numba only). Conventions are stated once
in :mod:`bandloom.blocks.dsp.banks`.
"""

from .banks import AnalysisBank, SynthesisBank, channel_offsets
from .design import BankDesign, design_bank
from .figures import ResponseFigures, cost_ratio, frequency_response, response_figures
from .frames import dual_window, frame_bounds, round_trip_transfer, tight_window

__all__ = [
    "AnalysisBank", "SynthesisBank", "BankDesign", "ResponseFigures",
    "channel_offsets", "cost_ratio", "design_bank", "dual_window", "frame_bounds",
    "frequency_response", "response_figures", "round_trip_transfer", "tight_window",
]
