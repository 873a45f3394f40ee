"""The re-derivation check: attention re-derived in float64 and compared with the model's own.

The check is the proof that a recording is right. From the captured per-head queries Q, keys K
and values V, and the score terms the family adds (``viewer.core.terms``), it recomputes, block
by block of query rows (``viewer.core.scores``),

    P = softmax(Q Kᵀ · scale + terms + M)              (Vaswani et al. 2017, Eq. 1)

in float64 and compares two things with what the model itself computed:

- **the attention output**: P · V against the model's own attention output of each head (the
  context before the output projection, which every attention kernel computes, the
  memory-efficient ones included). The error of a head is the largest absolute difference
  divided by the largest |value| entry of its key/value group: since a row of P sums to 1, no
  entry of P · V exceeds that, so the error is on the scale of the probabilities and the one
  tolerance serves both comparisons (docs/definitions.md, "Re-derivation check");
- **the probabilities**, where the model gave them (the eager kernel of a short text): P against
  the model's own, entry by entry, including that keys outside a row's view get exactly 0.

Agreement to ~1e-6 means the hooks captured the right tensors, in the right head order, with the
right scale, terms and mask; any mistake in the family map (a wrong split of a fused
projection, a missing rotary step, a wrong scale rule, a term left out) shows up as a large
error. The terms are defined in ``docs/families.md``.

Layers and key/value groups are independent, so the work is spread over threads (numpy releases
the GIL), each running its matrix products on one BLAS thread.
"""

from __future__ import annotations

import os
from collections.abc import Callable, Iterable
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass

import numpy as np

from viewer.core.recording import Recording
from viewer.core.scores import Block, LayerScores

DEFAULT_TOLERANCE = 1e-5


@dataclass(frozen=True)
class CheckResult:
    """Outcome of the re-derivation check over all layers and heads of one or more texts."""

    tolerance: float
    prob_errors: np.ndarray  # (L, H) max abs error of the probabilities; NaN where not compared
    context_errors: np.ndarray  # (L, H) max error of P·V against the model's attention output
    texts: int
    compared_probabilities: int = 0  # texts whose own probabilities the model gave
    cut: int = 0  # texts cut to the length the model reads (or to --max-tokens)

    @property
    def head_errors(self) -> np.ndarray:
        """(L, H) the worse of the two errors of each head."""
        return np.fmax(self.prob_errors, self.context_errors)

    @property
    def max_abs_error(self) -> float:
        return _worst(self.head_errors)

    @property
    def max_context_error(self) -> float:
        return _worst(self.context_errors)

    @property
    def max_probability_error(self) -> float | None:
        """None when no text's own probabilities were compared."""
        return None if np.isnan(self.prob_errors).all() else _worst(self.prob_errors)

    @property
    def passed(self) -> bool:
        return bool(self.max_abs_error <= self.tolerance)

    @property
    def layer_errors(self) -> np.ndarray:
        """(L,) max error per layer."""
        return self.head_errors.max(axis=1)

    def merge(self, other: CheckResult) -> CheckResult:
        return CheckResult(
            tolerance=self.tolerance,
            prob_errors=np.fmax(self.prob_errors, other.prob_errors),
            context_errors=np.maximum(self.context_errors, other.context_errors),
            texts=self.texts + other.texts,
            compared_probabilities=self.compared_probabilities + other.compared_probabilities,
            cut=self.cut + other.cut,
        )

    def to_dict(self) -> dict:
        def worst(errors: np.ndarray) -> float | None:
            seen = errors[~np.isnan(errors)]
            return float(seen.max()) if seen.size else None

        return {
            "max_abs_error": self.max_abs_error,
            "tolerance": float(self.tolerance),
            "passed": self.passed,
            "texts": self.texts,
            "max_context_error": self.max_context_error,
            "max_probability_error": self.max_probability_error,
            "probabilities_compared_in": self.compared_probabilities,
            "texts_cut": self.cut,
            "layers": [
                {
                    "layer": i,
                    "max_abs_error": float(e),
                    "heads": [float(x) for x in self.head_errors[i]],
                    "max_context_error": float(self.context_errors[i].max()),
                    "max_probability_error": worst(self.prob_errors[i]),
                }
                for i, e in enumerate(self.layer_errors)
            ],
        }


def _worst(errors: np.ndarray) -> float:
    """The largest error, NaN (not compared) left out; inf when any is infinite."""
    seen = errors[~np.isnan(errors)]
    return float(seen.max()) if seen.size else 0.0


class LayerCheck:
    """Errors of one layer of one text, filled block by block (``add``)."""

    def __init__(self, scores: LayerScores, v: np.ndarray, context: np.ndarray):
        self.scores, self.v, self.context = scores, v, context  # (G, T, d), (H, T, d)
        h = scores.n_heads
        self.prob = np.full(h, np.nan) if scores.own is None else np.zeros(h)
        self.ctx = np.zeros(h)
        # the largest |value| of each key/value group: the scale of P·V (module docstring)
        vmax = np.abs(v).reshape(v.shape[0], -1).max(axis=1, initial=0.0).astype(np.float64)
        self.vscale = np.where(vmax > 0, vmax, 1.0)  # (G,)
        self._v64: dict[int, np.ndarray] = {}

    def _values64(self, group: int) -> np.ndarray:
        """(T, d) float64 values of one key/value group, converted once per layer."""
        if self._v64.get(group) is None:
            self._v64[group] = np.asarray(self.v[group], dtype=np.float64)
        return self._v64[group]

    def merge(self, other: LayerCheck) -> None:
        """Fold the errors of another part of the same layer (other rows) into these."""
        self.prob = np.fmax(self.prob, other.prob)
        np.maximum(self.ctx, other.ctx, out=self.ctx)

    def release(self) -> None:
        """Drop the layer's arrays once every block has been added (the errors stay)."""
        self.scores = self.v = self.context = None
        self._v64 = {}

    def add(self, block: Block) -> None:
        """Compare one re-derived block with the model's attention output (and probabilities)."""
        heads, rows, keys, p = block.heads, block.rows, block.keys, block.p
        group = heads.start // self.scores.groups
        h, b, span = p.shape
        v = self._values64(group)[keys]  # (S, d)
        out = (p.reshape(h * b, span) @ v).reshape(h, b, -1)  # (h, b, d) P·V
        out -= self.context[heads, rows]
        np.abs(out, out=out)
        err = _failed_if_nan(out.reshape(h, -1).max(axis=1, initial=0.0) / self.vscale[group])
        np.maximum(self.ctx[heads], err, out=self.ctx[heads])
        own = self.scores.own
        if own is not None:
            mine = own[heads, rows]  # (h, b, T) the model's own, float32
            diff = np.abs(p - mine[:, :, keys]).reshape(h, -1).max(axis=1, initial=0.0)
            # keys outside the span must have exactly 0 in the model's own, too
            for outside in (mine[:, :, : keys.start], mine[:, :, keys.stop :]):
                if outside.size:
                    diff = np.maximum(diff, np.abs(outside).reshape(h, -1).max(axis=1))
            np.maximum(self.prob[heads], _failed_if_nan(diff), out=self.prob[heads])


def _failed_if_nan(errors: np.ndarray) -> np.ndarray:
    """A NaN difference (NaN in the model's numbers or ours) is a failure, not a pass."""
    errors[np.isnan(errors)] = np.inf
    return errors


def layer_pass(
    scores: LayerScores,
    *,
    check: LayerCheck | None = None,
    consumers: Iterable[Callable[[Block], None]] = (),
    mean_consumers: Iterable[Callable[[Block], None]] = (),
    rows: slice | None = None,
) -> None:
    """One pass over a layer (or over query ``rows`` of it) computing each block once.

    Per block of rows, every key/value group in turn: ``check`` gets the re-derived block;
    ``consumers`` (head metrics, overviews) get the model's own probabilities where it gave
    them, else the same re-derived block; ``mean_consumers`` get the head mean of the rows
    (as a one-head block).
    """
    consumers, mean_consumers = tuple(consumers), tuple(mean_consumers)
    derive = check is not None or scores.own is None
    rows = rows or slice(0, scores.n_tokens)
    for part in scores.row_blocks(rows):
        head_sum = None
        visible = scores.visible(part, scores.keys(part))  # the same for every group
        for g in range(scores.n_kv_heads):
            block = scores.block(scores.group_heads(g), part, own=not derive, visible=visible)
            if check is not None:
                check.add(block)
            shown = block
            if scores.own is not None and derive:
                shown = scores.block(block.heads, part, own=True, visible=visible)
            for consume in consumers:
                consume(shown)
            if mean_consumers:
                summed = shown.p.sum(axis=0)  # (b, S)
                head_sum = summed if head_sum is None else head_sum + summed
        if mean_consumers:
            mean = Block(slice(0, 1), part, shown.keys, (head_sum / scores.n_heads)[None], shown.visible)
            for consume in mean_consumers:
                consume(mean)


def run_parallel(tasks: list[Callable[[], None]], threads: int | None = None) -> None:
    """Run independent tasks on up to ``threads`` threads (default: one per core, at most 4);
    numpy releases the GIL in its loops and products, and its BLAS runs on one thread
    (``viewer.core.scores.one_blas_thread``)."""
    workers = min(4, os.cpu_count() or 1) if threads is None else max(1, int(threads))
    if workers == 1 or len(tasks) == 1:
        for task in tasks:
            task()
        return
    with ThreadPoolExecutor(max_workers=workers) as pool:
        for future in [pool.submit(task) for task in tasks]:
            future.result()


def check_recording(
    rec: Recording,
    tolerance: float = DEFAULT_TOLERANCE,
    threads: int | None = None,
    consumers: Callable[[int], dict[str, Iterable[Callable[..., None]]]] | None = None,
) -> CheckResult:
    """Re-derive every layer's and head's attention from the recording and compare.

    ``consumers(layer)`` may hand further consumers of each block (``{"heads": [...],
    "mean": [...]}``, see ``layer_pass``: head metrics, overviews), so that they are computed
    in the same pass, and under ``"done"`` functions called without arguments once the layer's
    pass is over (the window shows a layer's overviews as soon as they are complete). Layers
    run on up to ``threads`` threads; the window passes 1 to leave a core for drawing.
    """
    checks = [LayerCheck(rec.layer(layer), rec.v[layer], rec.context[layer]) for layer in range(rec.n_layers)]

    def task(layer: int) -> None:
        more = consumers(layer) if consumers else {}
        layer_pass(
            checks[layer].scores,
            check=checks[layer],
            consumers=more.get("heads", ()),
            mean_consumers=more.get("mean", ()),
        )
        checks[layer].release()
        for done in more.get("done", ()):
            done()

    run_parallel([lambda layer=layer: task(layer) for layer in range(rec.n_layers)], threads)
    return result_of(checks, tolerance, rec.own_probs is not None, rec.truncated)


def result_of(checks: list[LayerCheck], tolerance: float, compared: bool, cut: bool = False) -> CheckResult:
    """The CheckResult of one text from its layers' checks."""
    return CheckResult(
        tolerance=float(tolerance),
        prob_errors=np.array([c.prob for c in checks]),
        context_errors=np.array([c.ctx for c in checks]),
        texts=1,
        compared_probabilities=int(compared),
        cut=int(cut),
    )


def check_layer(
    scores: LayerScores, v: np.ndarray, context: np.ndarray, threads: int | None = None
) -> LayerCheck:
    """The check of one layer of one text, its rows split over ``threads`` threads (default one
    per core) in parts of about equal work (``LayerScores.split_rows``); the returned
    ``LayerCheck`` keeps only its errors, not the layer's arrays."""
    workers = min(4, os.cpu_count() or 1) if threads is None else max(1, int(threads))
    parts = scores.split_rows(workers)
    checks = [LayerCheck(scores, v, context) for _ in parts]
    run_parallel(
        [
            lambda c=c, rows=rows: layer_pass(scores, check=c, rows=rows)
            for c, rows in zip(checks, parts, strict=True)
        ],
        workers,
    )
    merged = checks[0]
    for other in checks[1:]:
        merged.merge(other)
    merged.release()
    return merged


def check_recordings(recs, tolerance: float = DEFAULT_TOLERANCE) -> CheckResult:
    """The check over several recordings (same model): per head, the worst over all texts."""
    result: CheckResult | None = None
    for rec in recs:
        one = check_recording(rec, tolerance)
        result = one if result is None else result.merge(one)
    if result is None:
        raise ValueError("no recordings to check")
    return result
