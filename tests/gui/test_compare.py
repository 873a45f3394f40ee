"""Compare says what a with/without comparison is for: both predictions with their class
probabilities and the difference, and "identical" when the two runs read the same tokens through
the same checkpoint (no ±1e-12 colour bar).

Reference: transformers' own sequence-classification forward of each checkpoint, loaded here
(``AutoModelForSequenceClassification``) on the recording's token ids, softmax by torch.
"""

from __future__ import annotations

import numpy as np
import torch
from transformers import AutoModelForSequenceClassification

from tests.gui.conftest import WAIT_MS, run_and_wait, settle


def library_probabilities(folder, token_ids: np.ndarray) -> np.ndarray:
    model = AutoModelForSequenceClassification.from_pretrained(folder, local_files_only=True)
    model.eval()
    with torch.no_grad():
        logits = model(input_ids=torch.from_numpy(token_ids)[None]).logits[0]
    return torch.softmax(logits.double(), dim=-1).numpy()


def compare_with(qtbot, window, kind: str, value: str):
    pane = window.compare_pane
    (pane.model_radio if kind == "model" else pane.text_radio).setChecked(True)
    (pane.folder_edit if kind == "model" else pane.text_edit).setText(value)
    old = window.state.compare
    window.run_compare()
    qtbot.waitUntil(
        lambda: window.state.compare is not None and window.state.compare is not old, timeout=WAIT_MS
    )
    qtbot.waitUntil(lambda: not window.worker.busy, timeout=WAIT_MS)
    return window.state.compare


def test_a_second_checkpoint_shows_both_predictions_and_the_difference(qtbot, window, tiny_dir, tiny_dir_b):
    current = run_and_wait(qtbot, window, evidence=False)
    other = compare_with(qtbot, window, "model", str(tiny_dir_b))
    ids = current.recording.token_ids
    p = library_probabilities(tiny_dir, ids)
    q = library_probabilities(tiny_dir_b, ids)
    labels = current.recording.labels
    this, compared, difference = window.compare_pane.summary.text().split("\n")
    assert window.compare_pane.summary.isVisible()
    assert this.startswith(f"this run: predicted {labels[int(np.argmax(p))]} · ")
    assert compared.startswith(f"compared (second checkpoint): predicted {labels[int(np.argmax(q))]} · ")
    for name, a, b in zip(labels, p, q, strict=True):
        assert f"{name} {a:.3f}" in this and f"{name} {b:.3f}" in compared
        assert f"{name} {b - a:+.3f}".replace("-", "−") in difference
    assert difference.startswith("compared − current: ")
    assert "identical" not in difference
    assert ("the prediction changes" in difference) == (int(np.argmax(p)) != int(np.argmax(q)))
    assert other.recording.predicted() == int(np.argmax(q))


def test_the_same_checkpoint_or_text_is_identical_not_a_tiny_difference(qtbot, window, tiny_dir):
    from tests.gui.conftest import TEXT

    current = run_and_wait(qtbot, window, evidence=False)
    for kind, value in (("model", str(tiny_dir)), ("text", TEXT)):
        compare_with(qtbot, window, kind, value)
        summary = window.compare_pane.summary.text()
        assert "identical: the same tokens through the same checkpoint" in summary, summary
        p = library_probabilities(tiny_dir, current.recording.token_ids)
        assert f"predicted {current.recording.labels[int(np.argmax(p))]}" in summary.split("\n")[1]
        # the head map says so instead of drawing a ±1e-12 colour bar
        assert window.state.difference
        settle(qtbot, window.head_map)
        assert not window.head_map.showing_figure
        assert window.head_map.message.text().startswith("identical: the compared run gives the same")
    # a different text is not identical
    compare_with(qtbot, window, "text", "invoice paid")
    assert "identical" not in window.compare_pane.summary.text()
    settle(qtbot, window.head_map)
    assert window.head_map.showing_figure and window.head_map.artists.diverging
