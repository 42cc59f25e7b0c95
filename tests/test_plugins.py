"""Block types from other installed packages, through the bandloom.blocks entry-point group."""

import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from bandloom.blocks.block import Block, Param, Port
from bandloom.runtime.plugins import PluginError, load_registry, validate_block_class
from runner import bandloom, run_flow

PLUGIN = Path(__file__).parent / "plugin_example"


@pytest.fixture(scope="module")
def installed_plugin():
    """pip-installs tests/plugin_example into this environment for the module's tests, then removes it."""
    subprocess.run([sys.executable, "-m", "pip", "install", "--quiet", "--no-deps", str(PLUGIN)], check=True,
                   capture_output=True)
    yield
    subprocess.run([sys.executable, "-m", "pip", "uninstall", "--quiet", "--yes", "bandloom-test-plugin"],
                   check=True, capture_output=True)


def test_flow_uses_a_plugin_block(installed_plugin, tmp_path):
    """A flow runs a block type that comes from another installed package, in its own process."""
    x = (np.arange(5000) * (1 + 0.5j) / 5000).astype(np.complex64)
    x.tofile(tmp_path / "in.cf32")
    flow = tmp_path / "flow.toml"
    flow.write_text('[blocks.src]\ntype = "iq-reader"\npath = "in.cf32"\nsample_rate = 48000\nchunk_size = 700\n'
                    '[blocks.louder]\ntype = "test-gain"\ngain = 3.0\n'
                    '[blocks.out]\ntype = "iq-writer"\npath = "out.cf32"\n'
                    '[[links]]\nfrom = "src.samples"\nto = "louder.samples"\n'
                    '[[links]]\nfrom = "louder.samples"\nto = "out.samples"\n')
    done, report = run_flow(flow, tmp_path)
    assert done.returncode == 0, done.stderr
    assert np.allclose(np.fromfile(tmp_path / "out.cf32", np.complex64), 3 * x)
    assert "plugin 'test-broken' from bandloom-test-plugin failed to load: ImportError" in done.stderr


def test_broken_plugin_is_named_and_others_still_load(installed_plugin):
    """'bandloom blocks' lists the good plugin and names the broken one with its distribution."""
    done = bandloom("blocks")
    assert done.returncode == 0
    assert "test-gain" in done.stdout and "bandloom-test-plugin" in done.stdout
    assert "channelizer" in done.stdout
    assert ("bandloom: warning: plugin 'test-broken' from bandloom-test-plugin failed to load: ImportError: "
            "this plugin needs a library that is not installed") in done.stderr


def test_blocked_plugin_is_not_loaded(installed_plugin, monkeypatch):
    """Names in BANDLOOM_BLOCKED_PLUGINS are skipped before loading, so their import never runs."""
    monkeypatch.setenv("BANDLOOM_BLOCKED_PLUGINS", "test-broken, test-gain")
    registry = load_registry()
    assert "test-gain" not in registry.types and not registry.failures


class _Good(Block):
    type_name = "good"
    summary = "ok"
    parameters = (Param("level", "quantity", "a level", unit="dBFS", default=0.0),)
    inputs = (Port("samples", "samples", "in"),)


@pytest.mark.parametrize("mutate,message", [
    (lambda c: setattr(c, "type_name", "other"), "registered as 'good'"),
    (lambda c: setattr(c, "summary", ""), "no one-line summary"),
    (lambda c: setattr(c, "parameters", (Param("x", "colour", "?"),)), "unknown kind 'colour'"),
    (lambda c: setattr(c, "parameters", (Param("type", "str", "?"),)), "repeated or reserved"),
    (lambda c: setattr(c, "parameters", (Param("on_failure", "str", "?"),)), "repeated or reserved"),
    (lambda c: setattr(c, "parameters", (Param("taps", "int", "?", minimum=1),)), "without both bounds"),
    (lambda c: setattr(c, "inputs", (Port("a", "wide", "?"),)), "is not a Port of kind"),
    (lambda c: setattr(c, "is_source", True), "a source block cannot have inputs"),
])
def test_block_contract_is_checked_at_registration(mutate, message):
    """A class that breaks the block contract is refused with the reason, before any flow uses it."""
    validate_block_class("good", _Good)
    broken = type("Broken", (_Good,), {})
    mutate(broken)
    with pytest.raises(PluginError, match=message):
        validate_block_class("good", broken)


def test_reserved_keys_are_the_runtime_keys_of_a_block_table():
    """A block parameter may not take a name the runtime reads from [blocks.NAME]: type, per_channel and
    the failure options and host (held equal here so that a new option cannot be shadowed by a plugin)."""
    from bandloom.runtime.flow.declarations import BLOCK_OPTION_KEYS
    from bandloom.runtime.plugins import RESERVED_KEYS
    assert RESERVED_KEYS == ("type", "per_channel", *BLOCK_OPTION_KEYS, "host")
