"""The statuses shares of a flow on several hosts publish (runtime/shares.py): what round-trips, and what a
peer holding the keys but meaning harm (or a damaged one) cannot make another share take."""

import msgpack
import pytest
from bandloom.runtime.control import BlockState, InletStats, OutletStats
from bandloom.runtime.shares import BlockView, ShareError, ShareState, ShareStatus, flow_digest

GOOD = ShareStatus(host="left", flow_digest="0123", state=ShareState.RUNNING, heard=("antenna",),
                   blocks={"low[0]": BlockView(state=BlockState.RUNNING, pid=42, inputs={3: InletStats(rows=9)}),
                           "split": BlockView(state=BlockState.DONE, outputs={3: OutletStats(rows=9, delivered_rows=9,
                                                                                           blocked_seconds=0.5)})})


def forged(change):
    values = msgpack.unpackb(GOOD.encode(), strict_map_key=False)
    change(values)
    return msgpack.packb(values)


def test_a_status_round_trips():
    """Everything a share says arrives as it was said (typed values, enums, counters by link id)."""
    assert ShareStatus.decode(GOOD.encode(), sender="left") == GOOD


@pytest.mark.parametrize("change, words", [
    (lambda v: v.update(host="antenna"), "says it is host 'antenna'"),
    (lambda v: v.update(state="conquering"), "not one"),
    (lambda v: v["blocks"]["split"]["outputs"][3].update(rows="lots"), "'lots' is not a whole number"),
    (lambda v: v["blocks"]["split"]["outputs"][3].update(rows=True), "True is not a whole number"),
    (lambda v: v["blocks"]["split"]["outputs"][3].update(rows=1 << 63), "is not a whole number"),
    (lambda v: v["blocks"]["split"]["outputs"][3].update(format_disk=1), "unknown counters"),
    (lambda v: v["blocks"]["low[0]"].update(pid=1.5), "1.5 is not a whole number"),
    (lambda v: v.update(lost_samples=-(1 << 63)), "is not a whole number"),
    (lambda v: v.update(reason=["not", "text"]), "reason is not text"),
    (lambda v: v.update(extra_field=1), "not one"),
])
def test_a_forged_status_is_refused_naming_the_host(change, words):
    """A status with another host's name, an unknown state, counters that are not whole numbers (or are
    huge, or booleans), unknown counters or fields, or text that is not text is refused, naming the sender."""
    with pytest.raises(ShareError) as refused:
        ShareStatus.decode(forged(change), sender="left")
    assert str(refused.value).startswith("host left:") and words in str(refused.value)


def test_bytes_that_are_not_a_status_are_refused():
    for raw in (b"", b"\xc1" * 10, msgpack.packb([1, 2, 3]), b"\x00" * (5 << 20)):
        with pytest.raises(ShareError):
            ShareStatus.decode(raw, sender="left")


def test_the_flow_digest_changes_with_the_file_and_the_overrides(tmp_path):
    """Shares compare digests: one byte of the file, or one --set, makes another flow."""
    path = tmp_path / "f.toml"
    path.write_text("[flow]\nname = 'a'\n")
    first = flow_digest(path)
    assert flow_digest(path) == first and flow_digest(path, ["band.seed=2"]) != first
    path.write_text("[flow]\nname = 'b'\n")
    assert flow_digest(path) != first
