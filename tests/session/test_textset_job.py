"""The window's text-set job and the one accuracy rule (docs/definitions.md, "Accuracy").

References: a confusion matrix counted by hand; the label checks of the definition (a set with
a label needs a known label on every text), which the window applies as the commands do.
"""

from __future__ import annotations

import json

import pytest

from tests.model import tiny
from viewer.errors import HeadlightError
from viewer.reports.predictions import accuracy_data
from viewer.session import jobs


def test_accuracy_by_hand():
    # labels a, b, b, c predicted a, b, c, c: right 3 of 4; per class a 1/1, b 1/2, c 1/1;
    # confusion rows are labels, columns predictions
    got = accuracy_data(["a", "b", "c"], [0, 1, 1, 2], [0, 1, 2, 2])
    assert (got["labelled"], got["correct"], got["accuracy"]) == (4, 3, 0.75)
    assert got["per_class"] == {
        "a": {"texts": 1, "correct": 1, "accuracy": 1.0},
        "b": {"texts": 2, "correct": 1, "accuracy": 0.5},
        "c": {"texts": 1, "correct": 1, "accuracy": 1.0},
    }
    assert got["confusion"] == [[1, 0, 0], [0, 1, 1], [0, 0, 1]]
    assert accuracy_data(["a"], None, [0, 0]) == {"labelled": 0}


@pytest.fixture(scope="module")
def ctx(tmp_path_factory):
    folder = tiny.save(tmp_path_factory.mktemp("bert"), "bert")
    context = jobs.JobContext(progress=lambda *a: None, cancelled=lambda: False, models={})
    jobs.open_model(context, "main", str(folder))
    return context


@pytest.mark.parametrize(
    "rows,message",
    [
        (
            [{"text": "a wheel", "label": "repair"}, {"text": "an invoice", "label": "refund"}],
            "'refund' is not one of",
        ),
        ([{"text": "a wheel", "label": "repair"}, {"text": "an invoice"}], "line 2 has no label"),
    ],
)
def test_the_window_refuses_a_label_the_model_does_not_know(ctx, tmp_path, rows, message):
    path = tmp_path / "set.jsonl"
    path.write_text("".join(json.dumps(r) + "\n" for r in rows), encoding="utf-8")
    with pytest.raises(HeadlightError, match=message):
        jobs.run_textset(ctx, "main", str(path))


def test_unlabelled_sets_have_no_accuracy_and_filter_by_words(ctx, tmp_path):
    path = tmp_path / "set.txt"
    path.write_text("fix my bike [via portal]\nvia -- portal\nthe portal\n", encoding="utf-8")
    result = jobs.run_textset(ctx, "main", str(path))
    assert result.accuracy is None and result.scores == {"labelled": 0}
    # docs/definitions.md, "Contains": by hand
    assert result.containing("via portal") == {0}
    assert [r.index for r in result.shown(False, "portal")] == [0, 1, 2]
    assert result.shown(True, "portal") == []  # no labels: nothing is a mistake
