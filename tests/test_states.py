"""The run-state table: legal steps change state, illegal ones raise StateError and change nothing."""

import pytest

from shotpair.daemon.states import TRANSITIONS, RunState, RunStateMachine, transition_table_markdown
from shotpair.drivers.errors import ShotpairError, StateError


def test_a_whole_scan_walks_the_table():
    m = RunStateMachine()
    for action, state in [("start", "preparing"), ("ready", "acquiring"), ("pause", "paused"),
                          ("resume", "acquiring"), ("finish", "stopping"), ("stopped", "idle")]:
        assert m.step(action).value == state


@pytest.mark.parametrize("state", list(RunState))
def test_illegal_steps_raise_and_keep_the_state(state):
    actions = {a for (_, a) in TRANSITIONS}
    for action in sorted(actions):
        m = RunStateMachine()
        m.state = state
        if (state, action) in TRANSITIONS:
            continue
        with pytest.raises(StateError) as info:
            m.step(action)
        assert isinstance(info.value, ShotpairError)
        assert info.value.state == state.value and info.value.action == action
        assert m.state is state


def test_pause_while_idle_names_what_is_allowed():
    with pytest.raises(StateError, match="cannot pause while idle: allowed now: move, start"):
        RunStateMachine().step("pause")


def test_markdown_table_lists_every_transition():
    text = transition_table_markdown()
    assert text.count("\n") == len(TRANSITIONS) + 1
    assert "| idle | start | preparing |" in text
