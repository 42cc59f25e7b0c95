"""The flow package's pieces on their own: a flow built in code, ordering, key paths, selection, the hand-over
to workers and what the supervisor records of a block process."""

import subprocess
import sys

import numpy as np
import pytest
from bandloom.runtime.control import BlockState, OutletStats, StatsMessage, WorkerEvent
from bandloom.runtime.flow import FlowErrors, WhenFull, check_flow, format_key_path
from bandloom.runtime.flow.graph import FlowCycle, producer_order
from bandloom.runtime.flow.locator import KeyLocator
from bandloom.runtime.flow.problems import parse_key_path
from bandloom.runtime.plugins import load_registry
from bandloom.runtime.supervisor import BlockRecord, link_specs
from bandloom.runtime.worker_spec import WorkerSpec


def small_flow(tmp_path, **link_options):
    np.zeros(4096, np.complex64).tofile(tmp_path / "in.cf32")
    return {"blocks": {"sink": {"type": "discard"},
                       "source": {"type": "iq-reader", "path": "in.cf32", "sample_rate": "1 MHz"},
                       "split": {"type": "channelizer", "channels": 8}},
            "links": [{"from": "source.samples", "to": "split.samples"},
                      {"from": "split.channels", "to": "sink.samples", "select": "2..3", **link_options}]}


def test_a_flow_built_in_code_is_checked_like_a_file(tmp_path):
    """check_flow takes the mapping tomllib would give: producers come first, links carry their options."""
    flow = check_flow(small_flow(tmp_path, queue=3, when_full="drop"), load_registry(), path=tmp_path / "made.toml")
    assert list(flow.instances) == ["source", "split", "sink"]
    first, second = flow.links
    assert (first.source, first.target, first.options.queue, first.options.when_full) == \
        ("source", "split", 8, WhenFull.WAIT)
    assert (second.columns, second.options.queue, second.options.when_full) == ((2, 3), 3, WhenFull.DROP)
    assert second.label == "split.channels[2 channels] -> sink.samples" and second.declared_at == "links[1]"
    assert flow.instances["sink"].input_streams["samples"].channels == (2, 3)
    assert flow.name == "made"


def test_problems_of_a_flow_built_in_code_name_the_key_path(tmp_path):
    """Without TOML text there are no line numbers, but every problem still names file and key path."""
    with pytest.raises(FlowErrors) as caught:
        check_flow(small_flow(tmp_path, queue=0), load_registry(), path=tmp_path / "made.toml")
    assert str(caught.value) == (f"{tmp_path / 'made.toml'}: links[1].queue: expected a whole number of messages "
                                 f"from 1 to 100000, got 0")


def test_producers_come_before_consumers_and_loops_name_their_members():
    """The order keeps declaration order among equals; a loop is refused naming the blocks on it."""
    assert producer_order(["c", "a", "b", "d"], {"a": ["b"], "b": ["c"]}) == ["a", "d", "b", "c"]
    with pytest.raises(FlowCycle) as caught:
        producer_order(["src", "x", "y", "tail"], {"src": ["x"], "x": ["y"], "y": ["x", "tail"]})
    assert caught.value.members == ["x", "y"]


def test_key_paths_and_their_lines():
    """Key paths are written one way, read back, and found on the line where the key is written."""
    path = ("links", 1, "select")
    assert format_key_path(path) == "links[1].select" and parse_key_path("links[1].select") == path
    text = ('[blocks.a]\ntype = "x"\n\n[[links]]\nfrom = "a.o"\n\n[[links]]\nfrom = "a.o"\n'
            'select = [1, 2]\n\n[blocks.b]\n"type" = "y"\n')
    locate = KeyLocator(text).find
    assert locate(("links", 1, "select")) == 9
    assert locate(("links", 1)) == 7
    assert locate(("blocks", "b", "type")) == 12
    assert locate(("blocks", "b", "missing")) == 11          # the table, when the key is not written
    assert locate(("links", 5, "from")) is None


def test_the_hand_over_to_a_worker(tmp_path):
    """Inputs bind their private endpoints, outputs connect with their channel columns, and the whole
    WorkerSpec comes back from its JSON unchanged."""
    flow = check_flow(small_flow(tmp_path), load_registry(), path=tmp_path / "made.toml")
    _, split_outputs = link_specs("/run", flow.instances["split"])
    sink_inputs, _ = link_specs("/run", flow.instances["sink"])
    out, = split_outputs["channels"]
    into = sink_inputs["samples"]
    assert (out.endpoint, out.bind, out.columns) == ("ipc:///run/1", False, (2, 3))
    assert (into.endpoint, into.bind, into.columns) == ("ipc:///run/1", True, None)
    spec = WorkerSpec(name="split", type_name="channelizer", params=flow.instances["split"].params,
                      flow_path="made.toml", output_dir=".", control="ipc:///run/control", stats="ipc:///run/stats",
                      outputs=split_outputs)
    assert WorkerSpec.from_json(spec.to_json()) == spec


def test_the_record_of_a_block_process(tmp_path):
    """Statistics move the record's state and rate; a process that exits non-zero without an error is 'died'."""
    process = subprocess.Popen([sys.executable, "-c", "raise SystemExit(3)"])
    record = BlockRecord("split", process)
    record.absorb(StatsMessage(event=WorkerEvent.HELLO, block="split", pid=process.pid, time=1.0, rows_in=0))
    record.absorb(StatsMessage(event=WorkerEvent.STATS, block="split", pid=process.pid, time=1.5, rows_in=500,
                               outputs={1: OutletStats(rows=500)}))
    assert record.state is BlockState.RUNNING and record.rate == pytest.approx(1000.0)
    record.process_ended(process.wait())
    assert record.state is BlockState.DIED and record.state.is_failure and record.exit_reason == ""
