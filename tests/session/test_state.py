"""The selection state without Qt: events fire only on real change, writers validate."""

from __future__ import annotations

import pytest

from viewer.session.events import Event
from viewer.session.state import ModelInfo, Selection


def recorder(state: Selection, *fields: str) -> list[tuple[str, object]]:
    seen: list[tuple[str, object]] = []
    for name in fields:
        getattr(state.events, name).connect(lambda v, n=name: seen.append((n, v)))
    return seen


def info(layers: int = 3, heads: int = 4) -> ModelInfo:
    return ModelInfo("/m", "m", "bert", layers, heads, ("a", "b"), "classifier", 64)


def test_events_fire_only_on_real_change():
    state = Selection()
    seen = recorder(state, "layer", "head", "metric")
    state.set_model(info())
    state.select_head(1, 2)
    state.select_head(1, 2)  # same again: no event
    state.set_metric("entropy")  # the default: no event
    state.set_metric("distance")
    assert seen == [("layer", 1), ("head", 2), ("metric", "distance")]


def test_head_mean_is_none_and_moves_wrap_inside_the_layer():
    state = Selection()
    state.set_model(info(heads=2))
    state.select_head(0, 1)
    state.move_head(1)
    assert state.head is None  # after the last head comes the head mean
    state.move_head(1)
    assert state.head is None
    state.move_layer(5)
    assert state.layer == 2
    state.move_layer(-9)
    assert state.layer == 0


def test_writers_refuse_what_does_not_exist():
    state = Selection()
    state.set_model(info())
    with pytest.raises(ValueError):
        state.select_head(3, 0)
    with pytest.raises(ValueError):
        state.set_metric("colour")
    with pytest.raises(ValueError):
        state.set_compare_target(("image", "x"))


def test_a_new_model_drops_the_old_runs():
    state = Selection()
    state.set_model(info())
    state.set_compare(object())
    state.set_difference(True)
    seen = recorder(state, "compare", "difference")
    state.set_model(info(layers=2))
    assert state.compare is None and state.difference is False
    assert ("compare", None) in seen


def test_blocked_event_is_silent():
    event = Event("x")
    seen = []
    event.connect(seen.append)
    with event.blocked():
        event.emit(1)
    event.emit(2)
    assert seen == [2]


def test_a_second_text_set_clears_the_first_sets_report_and_filters():
    """Opening another text set must not keep the old set's shortcut report, word or row."""
    state = Selection()
    state.set_model(info())
    first, second = object(), object()
    state.set_textset(first)
    state.set_shortcuts(object())
    state.select_word("portal")
    state.select_item(4)
    state.set_scope("set")
    state.set_textset(second)
    assert state.textset is second
    assert state.shortcuts is None and state.word is None and state.item is None
    assert state.scope == "set"  # the set scope now shows the new set's summaries
    state.set_textset(None)
    assert state.scope == "text"
