"""The examples in the public docstrings run as written (doctest) and give what they show."""

import doctest
import importlib

import pytest

MODULES = [
    "bandloom.blocks.block", "bandloom.blocks.params", "bandloom.blocks.sample_formats",
    "bandloom.blocks.dsp.banks", "bandloom.blocks.dsp.design", "bandloom.blocks.dsp.errors",
    "bandloom.blocks.text_tables", "bandloom.runtime.control", "bandloom.runtime.worker_spec", "bandloom.runtime.flow.problems",
    "bandloom.runtime.flow.locator", "bandloom.runtime.flow.selection", "bandloom.runtime.flow.graph",
    "bandloom.runtime.shared_rings", "bandloom.runtime.links", "bandloom.runtime.shares", "bandloom.runtime.verify_commands",
    "bandloom.runtime.wire", "bandloom.runtime.arguments",
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


def test_every_module_with_examples_is_run_here():
    """A module that shows an example (a line starting '>>> ') is in MODULES, so its examples are run."""
    from pathlib import Path
    shown = set()
    for top in ("bandloom.blocks", "bandloom.runtime"):
        folder = Path(importlib.import_module(top).__file__).parent
        shown |= {".".join([top, *path.relative_to(folder).with_suffix("").parts]) for path in folder.rglob("*.py")
                  if any(line.lstrip().startswith(">>> ") for line in path.read_text().splitlines())}
    assert shown and shown <= set(MODULES), sorted(shown - set(MODULES))
