"""The examples in the public docstrings run as written (doctest) and give what they show."""

import doctest
import importlib

import pytest

MODULES = [
    "bandloom.blocks.block", "bandloom.blocks.params", "bandloom.blocks.sample_formats",
    "bandloom.blocks.dsp.banks", "bandloom.blocks.dsp.design", "bandloom.blocks.dsp.errors",
    "bandloom.blocks.text_tables", "bandloom.runtime.control", "bandloom.runtime.worker_spec", "bandloom.runtime.flow.problems",
    "bandloom.runtime.flow.locator", "bandloom.runtime.flow.selection", "bandloom.runtime.flow.graph",
]


@pytest.mark.parametrize("name", MODULES)
def test_docstring_examples_run(name):
    """Every example in the module's docstrings gives the output it shows, and there is at least one."""
    module = importlib.import_module(name)
    result = doctest.testmod(module, optionflags=doctest.ELLIPSIS | doctest.NORMALIZE_WHITESPACE)
    assert result.attempted > 0, f"{name} has no examples"
    assert result.failed == 0


def test_the_public_classes_carry_an_example():
    """AnalysisBank, SynthesisBank, design_bank and Block each document an example (numpydoc 'Examples')."""
    from bandloom.blocks.block import Block
    from bandloom.blocks.dsp import AnalysisBank, SynthesisBank, design_bank
    for thing in (AnalysisBank, SynthesisBank, design_bank, Block):
        assert "Examples\n    --------" in thing.__doc__ and ">>> " in thing.__doc__, thing.__name__
