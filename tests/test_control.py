"""The runtime's own messages and the block life cycle: control words, statistics, the transition table."""

import pytest
from bandloom.runtime.control import (
    TERMINAL_STATES,
    TRANSITIONS,
    BlockState,
    Control,
    ControlWord,
    InletStats,
    OutletStats,
    ProcessEnd,
    StatsMessage,
    WorkerEvent,
    next_state,
)

LIVE = (BlockState.STARTING, BlockState.RUNNING, BlockState.ENDING)


def test_control_messages_round_trip_and_junk_is_ignored():
    """Each control word encodes to its bytes and back; bytes that are no control word decode to None."""
    for message in (Control(ControlWord.STOP), Control(ControlWord.ABORT), Control(ControlWord.RELEASE, "keep[3]")):
        assert Control.decode(message.encode()) == message
    assert Control(ControlWord.RELEASE, "split").encode() == b"release split"
    assert Control.decode(b"explode now") is None
    assert Control.decode(b"\xff\xfe") is None


def test_a_block_runs_ends_and_finishes():
    """The ordinary life: starting -> running (hello) -> ending -> done, and a clean exit keeps it done."""
    state = BlockState.STARTING
    for event, expected in ((WorkerEvent.HELLO, BlockState.RUNNING), (WorkerEvent.STATS, BlockState.RUNNING),
                            (WorkerEvent.ENDING, BlockState.ENDING), (WorkerEvent.STATS, BlockState.ENDING),
                            (WorkerEvent.DONE, BlockState.DONE), (ProcessEnd.CLEAN, BlockState.DONE)):
        state = next_state(state, event)
        assert state is expected


@pytest.mark.parametrize("state", LIVE)
def test_a_process_that_ends_without_a_word(state):
    """A live block whose process ends: exit 0 counts as done, anything else as died (a failure)."""
    assert next_state(state, ProcessEnd.CLEAN) is BlockState.DONE
    died = next_state(state, ProcessEnd.FAULT)
    assert died is BlockState.DIED and died.is_failure


def test_an_error_then_any_exit_is_a_failure():
    """A block that reported an error has failed however its process then ends."""
    state = next_state(BlockState.RUNNING, WorkerEvent.ERROR)
    assert state is BlockState.ERROR and not state.is_failure
    assert next_state(state, ProcessEnd.CLEAN) is BlockState.FAILED
    assert next_state(state, ProcessEnd.FAULT) is BlockState.FAILED


@pytest.mark.parametrize("state", sorted(TERMINAL_STATES))
def test_terminal_states_never_change(state):
    """No event and no process end moves a block out of done, aborted, failed or died."""
    for happened in list(WorkerEvent) + list(ProcessEnd):
        assert next_state(state, happened) is state
    assert not any(key[0] is state for key in TRANSITIONS)


def test_statistics_round_trip():
    """A statistics message survives msgpack with typed counters keyed by link id."""
    message = StatsMessage(event=WorkerEvent.ERROR, block="split", pid=42, time=3.25, rows_in=10, rows_out=20,
                           inputs={0: InletStats(rows=10, messages=2, seq=1, gaps=1, missing=5)},
                           outputs={1: OutletStats(rows=20, dropped_rows=3), 2: OutletStats()},
                           progress=(5, 10), report=["a line"], message="disk full")
    assert StatsMessage.decode(message.encode()) == message
