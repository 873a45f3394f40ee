"""Every pane agrees with the numbers of the ``headlight`` commands on the same inputs.

References: ``viewer.reports.evidence.evidence_for`` (``headlight evidence``),
``viewer.reports.heads.head_importance`` / ``head_knockout`` (``headlight heads``),
``viewer.reports.links.link_report`` (``headlight links``) and
``viewer.core.attention.check_recording`` (``headlight check``).
"""

from __future__ import annotations

import json

import numpy as np
import pytest

from tests.gui.conftest import TEXT, WAIT_MS, run_and_wait, settle


@pytest.fixture(scope="module")
def loaded(tiny_dir):
    from viewer.model.loader import open_model

    return open_model(tiny_dir)


def test_evidence_strip_and_head_metrics_match_the_reports(qtbot, window, loaded):
    from viewer.reports.evidence import ROWS, evidence_for
    from viewer.reports.heads import head_importance, head_knockout
    from viewer.reports.textsets import TextItem

    analysis = run_and_wait(qtbot, window, TEXT)
    ev = window.state.evidence
    reference = evidence_for(loaded, TEXT)
    shown = [k for k in ROWS if np.isfinite(reference.rows[k]).any()]
    labels, values, agreement = ev.strip_rows()
    assert len(labels) == len(shown)
    for row, kind in zip(values, shown, strict=True):
        np.testing.assert_allclose(row, reference.rows[kind], rtol=1e-5, atol=1e-7, equal_nan=True)
    assert ev.withheld == reference.withheld  # docs/definitions.md, "Flat knockout"
    for rho, kind in zip(agreement, shown, strict=True):
        if kind == "knockout":
            assert rho == ("knockout flat" if reference.withheld else "reference")
        elif reference.withheld:  # this random tiny model's knockout row may be flat
            assert rho == "ρ withheld"
        else:
            assert rho == pytest.approx(reference.agreement[kind], abs=1e-6)
    item = [TextItem(TEXT, None, 1)]
    np.testing.assert_allclose(
        ev.head_importance, head_importance(loaded, item)["importance"], rtol=1e-5, atol=1e-7
    )
    np.testing.assert_allclose(
        ev.head_knockout, head_knockout(loaded, item)["prob_drop"], rtol=1e-5, atol=1e-7
    )
    pane = window.head_map
    for metric, values in (("importance", ev.head_importance), ("knockout", ev.head_knockout)):
        pane.metric_box.setCurrentIndex(pane.metric_box.findData(metric))
        settle(qtbot, pane)
        np.testing.assert_array_equal(np.ma.getdata(pane.displayed_values()), values)
    settle(qtbot, window.evidence)
    assert window.evidence.showing_figure
    assert analysis.recording.predicted_label() in window.evidence.title_label.text()


def test_the_check_badge_opens_the_per_layer_errors(qtbot, window):
    from viewer.core.attention import check_recording

    analysis = run_and_wait(qtbot, window, TEXT, evidence=False)
    expected = check_recording(analysis.recording)
    assert window.badge.text() == f"check passed · max error {expected.max_abs_error:.1e}"
    window.badge.click()
    dialog = window.badge.dialog
    assert dialog is not None and dialog.isVisible()
    assert dialog.table.rowCount() == len(expected.layer_errors)
    for layer, err in enumerate(expected.layer_errors):
        assert dialog.table.item(layer, 1).text() == f"{err:.3e}"
    dialog.close()


def test_link_accuracy_matches_the_link_report(qtbot, window, loaded, tmp_path):
    from viewer.core.links import read_link_pairs
    from viewer.reports.links import link_report

    path = tmp_path / "pairs.jsonl"
    pairs = [
        {
            "text": "the mechanic trued the wheel and she replaced the chain",
            "source": "she",
            "target": "mechanic",
            "distractors": ["wheel"],
        },
        {
            "text": "a member asked about the invoice and she paid it",
            "source": "she",
            "target": "member",
            "distractors": ["invoice"],
        },
        {
            "text": "the courier left the frame and he fixed the tyre",
            "source": "he",
            "target": "courier",
            "distractors": ["frame"],
        },
    ]
    path.write_text("".join(json.dumps(p) + "\n" for p in pairs), encoding="utf-8")
    window.open_pairs(str(path))
    qtbot.waitUntil(lambda: window.state.link_pairs is not None, timeout=WAIT_MS)
    reference = link_report(loaded, read_link_pairs(path))
    result = window.state.link_pairs.report
    np.testing.assert_array_equal(result.accuracy, reference.accuracy)
    assert result.nearest_baseline == reference.nearest_baseline
    assert result.best() == reference.best()
    pane = window.links
    assert pane.view_box.isVisible() and pane.view_box.currentData() == "file"
    settle(qtbot, pane)
    np.testing.assert_array_equal(np.ma.getdata(pane.accuracy_artists.image.get_array()), reference.accuracy)


def test_window_and_link_pairs_give_the_same_score_for_a_word_with_an_apostrophe(qtbot, window, loaded):
    """The window's word for a clicked token is the word a link-pairs file names.

    Reference: ``score_pair`` on a ``make_pair`` of the same words, which is how ``headlight
    links`` scores a pair of a file.
    """
    from viewer.core.links import make_pair, score_pair

    text = "the co-op's mechanic said she fixed the wheel"
    analysis = run_and_wait(qtbot, window, text, evidence=False)
    rec = analysis.recording
    she = next(i for i, (a, b) in enumerate(rec.offsets) if text[a:b] == "she")
    coop = next(i for i, (a, b) in enumerate(rec.offsets) if b > a and a == text.index("co-op"))
    u = analysis.units
    assert u.names[u.unit_of(coop)] == "co-op's"
    from viewer.session.analysis import per_head_link

    window_score = per_head_link(analysis, she, coop)
    pair = make_pair(text, "she", "co-op's", ["mechanic"])
    file_score = score_pair(rec.query_rows, rec.offsets, pair).scores[0]
    np.testing.assert_array_equal(window_score, file_score)
    reference = score_pair(loaded.record(text).query_rows, rec.offsets, pair).scores[0]
    np.testing.assert_allclose(window_score, reference, atol=1e-6)
