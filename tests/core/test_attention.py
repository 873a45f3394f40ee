"""The re-derivation check on hand-built recordings (numpy only, no model).

The model's probabilities are stood in for by SciPy's softmax of Q Kᵀ · scale (reference:
``scipy.special.softmax``; Vaswani et al. 2017, Eq. 1), and the head outputs by probs @ V. A
recording without the model's own probabilities (a long text's) is checked on its head outputs
alone, and must fail just the same when something is wrong.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
from scipy.special import softmax as scipy_softmax

from viewer.core.attention import check_recording
from viewer.core.recording import Recording


def make_recording(
    rng: np.random.Generator,
    n_layers: int = 2,
    n_heads: int = 4,
    n_kv: int = 2,
    t: int = 7,
    d: int = 8,
    causal: bool = False,
    own: bool = True,
) -> Recording:
    q = rng.normal(size=(n_layers, n_heads, t, d)).astype(np.float32)
    k = rng.normal(size=(n_layers, n_kv, t, d)).astype(np.float32)
    v = rng.normal(size=(n_layers, n_kv, t, d)).astype(np.float32)
    scale = np.full(n_layers, d**-0.5)
    kk = np.repeat(k.astype(np.float64), n_heads // n_kv, axis=1)  # GQA: head h uses h // groups
    vv = np.repeat(v.astype(np.float64), n_heads // n_kv, axis=1)
    scores = q.astype(np.float64) @ kk.transpose(0, 1, 3, 2) * scale[:, None, None, None]
    if causal:
        scores[..., ~np.tril(np.ones((t, t), dtype=bool))] = -np.inf
    probs = scipy_softmax(scores, axis=-1)
    return Recording(
        text="x",
        tokens=tuple(f"t{i}" for i in range(t)),
        offsets=np.zeros((t, 2), np.int64),
        special=np.zeros(t, bool),
        token_ids=np.arange(t),
        q=q,
        k=k,
        v=v,
        own_probs=probs.astype(np.float32) if own else None,
        context=(probs @ vv).astype(np.float32),
        scale=scale,
        causal=causal,
        logits=np.zeros(0, np.float32),
        head_kind="encoder",
    )


def test_a_consistent_recording_passes():
    rec = make_recording(np.random.default_rng(0), causal=True)
    result = check_recording(rec)
    assert result.passed, result.to_dict()
    assert result.max_abs_error < 1e-6 and result.max_context_error < 1e-5


def test_head_outputs_that_are_not_probs_times_values_fail_the_check():
    """Probabilities right, captured head outputs wrong: the verdict must be FAILED."""
    rec = make_recording(np.random.default_rng(1))
    context = rec.context.copy()
    context[1, 2, 3] += 1e-3  # layer 1 · head 2, one query row off
    bad = dataclasses.replace(rec, context=context)
    result = check_recording(bad)
    assert result.max_probability_error < 1e-6, "the probabilities themselves still agree"
    assert not result.passed
    assert result.context_errors[1, 2] > 1e-4 and result.context_errors[0].max() < 1e-5
    data = result.to_dict()
    assert data["passed"] is False and data["max_context_error"] > 1e-4
    assert data["layers"][1]["max_context_error"] > 1e-4


def test_merged_results_keep_a_head_output_failure():
    rng = np.random.default_rng(2)
    good = check_recording(make_recording(rng))
    rec = make_recording(rng)
    bad = check_recording(dataclasses.replace(rec, context=rec.context * 1.01))
    assert good.passed and not bad.passed
    assert not good.merge(bad).passed and not bad.merge(good).passed


def test_without_the_models_probabilities_the_head_outputs_decide():
    """The route of long texts: only P·V against the model's head outputs is compared."""
    rec = make_recording(np.random.default_rng(3), causal=True, own=False)
    result = check_recording(rec)
    assert result.passed and result.max_probability_error is None
    assert result.to_dict()["max_probability_error"] is None
    # a wrong scale, heads out of order, a lost causal mask: each fails on the outputs alone
    for bad in (
        dataclasses.replace(rec, scale=rec.scale * 1.5),
        dataclasses.replace(rec, q=rec.q[:, ::-1].copy()),
        dataclasses.replace(rec, causal=False),
    ):
        verdict = check_recording(bad)
        assert not verdict.passed and verdict.max_context_error > 1e-3


def test_context_error_is_on_the_scale_of_the_values():
    """Worked example: one head output off by 0.01 where the largest |value| of its group is
    2.0 gives an error of 0.01 / 2.0 = 0.005 (docs/definitions.md, "Re-derivation check")."""
    rec = make_recording(np.random.default_rng(4), n_layers=1, n_heads=2, n_kv=1, own=False)
    v = rec.v.copy()
    v /= np.abs(v).max()
    v *= 2.0  # the group's largest |value| is now exactly 2.0
    kk = np.repeat(rec.k.astype(np.float64), 2, axis=1)
    vv = np.repeat(v.astype(np.float64), 2, axis=1)
    probs = scipy_softmax(rec.q.astype(np.float64) @ kk.transpose(0, 1, 3, 2) * rec.scale[0], axis=-1)
    context = (probs @ vv).astype(np.float64)
    context[0, 1, 2, 3] += 0.01
    result = check_recording(dataclasses.replace(rec, v=v, context=context.astype(np.float32)))
    assert result.context_errors[0, 1] == pytest.approx(0.005, rel=1e-3)
    assert result.context_errors[0, 0] < 1e-6


def test_a_nan_in_the_models_output_fails():
    rec = make_recording(np.random.default_rng(5), own=False)
    context = rec.context.copy()
    context[0, 0, 0, 0] = np.nan
    assert not check_recording(dataclasses.replace(rec, context=context)).passed


@pytest.mark.parametrize(
    ("causal", "window"), [(True, None), (False, (3, 3)), (True, (2, -1)), (False, (-1, 4)), (False, None)]
)
def test_the_visible_mask_of_a_key_span_is_the_span_of_the_whole_rows(causal, window):
    """Reference: the rule written out cell by cell (j <= i when causal; i − j <= before and
    j − i <= after, −1 not limiting), over every key; a block's mask over its key span is the
    same cells (the span form is what keeps a windowed layer's cost at its window)."""
    from viewer.core.terms import visible_rows

    n = 17

    def sees(i: int, j: int) -> bool:
        ok = j <= i if causal else True
        if window is not None:
            before, after = window
            ok = ok and (before < 0 or i - j <= before) and (after < 0 or j - i <= after)
        return ok

    whole = np.array([[sees(i, j) for j in range(n)] for i in range(n)])
    for rows, keys in (
        (slice(0, 5), slice(0, 9)),
        (slice(6, 11), slice(2, 15)),
        (slice(12, 17), slice(8, 17)),
    ):
        got = visible_rows(rows, n, causal, window, keys)
        if whole.all():
            assert got is None
            continue
        np.testing.assert_array_equal(got, whole[rows, keys])
        np.testing.assert_array_equal(visible_rows(rows, n, causal, window), whole[rows])


def test_rows_are_split_over_threads_by_their_work_and_every_row_is_checked():
    """Worked examples of ``split_rows``: a causal row i sees i + 1 keys, so two equal halves of
    Σ (i + 1) = 5,050 over 100 rows cut at 71 (Σ_{i<71} (i + 1) = 2,556 ≥ 2,525 > Σ_{i<70} =
    2,485); a window of 2 keys each side gives widths 3, 4, 5, …, 5, 4, 3. And a head-output
    error in the last row is found whatever the number of threads (every row is in a part)."""
    from viewer.core.attention import check_layer

    rec = make_recording(np.random.default_rng(5), causal=True, t=100, own=False)
    scores = rec.layer(0)
    assert scores.split_rows(2) == [slice(0, 71), slice(71, 100)]
    assert scores.split_rows(1) == [slice(0, 100)]
    windowed = dataclasses.replace(scores.terms, window=np.array([[2, 2]]))
    wide = type(scores)(rec.q[0], rec.k[0], 1.0, False, windowed, 0)
    widths = wide.span_widths()
    assert widths[:3].tolist() == [3, 4, 5] and widths[-3:].tolist() == [5, 4, 3] and set(widths[2:-2]) == {5}
    context = rec.context.copy()
    context[0, 1, 99] += 1e-3  # the last row of head 1
    for threads in (1, 2, 3):
        errors = check_layer(rec.layer(0), rec.v[0], context[0], threads=threads).ctx
        assert errors[1] > 1e-4 and np.delete(errors, 1).max() < 1e-5, threads
