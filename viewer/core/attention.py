"""Scaled dot-product attention, re-derived in float64 from captured queries and keys.

The re-derivation check is the proof that a recording is right: from the captured per-head
queries Q and keys K we recompute

    P = softmax(Q Kᵀ · scale + M)                      (Vaswani et al. 2017, Eq. 1)

where M is 0 where a query may see a key and −∞ elsewhere (causal rows see keys j <= i), and
compare P with the probabilities the model itself produced. Agreement to ~1e-6 means that the
hooks captured the right tensors, in the right head order, with the right scale and mask; any
mistake in the family map (a wrong split of a fused projection, a missing rotary step, a wrong
scale rule) shows up as a large error.
"""

from __future__ import annotations

import os
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass

import numpy as np

from viewer.core.recording import Recording
from viewer.core.softmax import softmax

DEFAULT_TOLERANCE = 1e-5


def visible_keys(n_tokens: int, causal: bool) -> np.ndarray:
    """(T, T) bool: True where query row i may attend to key column j."""
    if causal:
        return np.tril(np.ones((n_tokens, n_tokens), dtype=bool))
    return np.ones((n_tokens, n_tokens), dtype=bool)


def repeat_kv(x: np.ndarray, n_heads: int) -> np.ndarray:
    """Expand grouped key/value heads to one per query head.

    x: (..., G, T, d) -> (..., H, T, d); query head h uses key/value head h // (H / G),
    the grouping of Ainslie et al. 2023 (GQA), §3.
    """
    g = x.shape[-3]
    if n_heads % g:
        raise ValueError(f"{n_heads} query heads cannot share {g} key/value heads evenly")
    return np.repeat(x, n_heads // g, axis=-3)


def attention_probabilities(
    q: np.ndarray, k: np.ndarray, scale: float, causal: bool
) -> np.ndarray:
    """softmax(Q Kᵀ · scale + M) in float64.

    q: (H, T, d) queries; k: (G, T, d) keys (G divides H). Returns (H, T, T).
    """
    q64 = np.asarray(q, dtype=np.float64) * float(scale)  # scaling q is cheaper than scores
    k64 = repeat_kv(np.asarray(k, dtype=np.float64), q64.shape[0])
    scores = np.matmul(q64, k64.transpose(0, 2, 1))  # (H, T, T)
    return softmax(scores, visible_keys(q64.shape[1], causal) if causal else None)


def head_outputs(probs: np.ndarray, v: np.ndarray) -> np.ndarray:
    """Each head's context vectors probs @ V: probs (H, T, T), v (G, T, d) -> (H, T, d)."""
    v64 = repeat_kv(np.asarray(v, dtype=np.float64), probs.shape[0])
    return np.matmul(np.asarray(probs, dtype=np.float64), v64)  # (H, T, d)


@dataclass(frozen=True)
class CheckResult:
    """Outcome of the re-derivation check over all layers and heads of one or more texts."""

    max_abs_error: float
    tolerance: float
    head_errors: np.ndarray  # (L, H) max absolute error per head over all texts checked
    context_errors: np.ndarray  # (L, H) max abs error of probs @ V against captured head outputs
    texts: int

    @property
    def max_context_error(self) -> float:
        """Largest error of probs @ V against the captured head outputs."""
        worst = float(self.context_errors.max()) if self.context_errors.size else 0.0
        return worst if np.isfinite(worst) else float("inf")

    @property
    def passed(self) -> bool:
        """Both the probabilities and the head outputs agree within the tolerance."""
        return bool(self.max_abs_error <= self.tolerance
                    and self.max_context_error <= self.tolerance)

    @property
    def layer_errors(self) -> np.ndarray:
        """(L,) max absolute error per layer."""
        return self.head_errors.max(axis=1)

    def merge(self, other: CheckResult) -> CheckResult:
        return CheckResult(
            max_abs_error=max(self.max_abs_error, other.max_abs_error),
            tolerance=self.tolerance,
            head_errors=np.maximum(self.head_errors, other.head_errors),
            context_errors=np.maximum(self.context_errors, other.context_errors),
            texts=self.texts + other.texts,
        )

    def to_dict(self) -> dict:
        return {
            "max_abs_error": float(self.max_abs_error),
            "tolerance": float(self.tolerance),
            "passed": self.passed,
            "texts": self.texts,
            "layers": [
                {
                    "layer": i,
                    "max_abs_error": float(e),
                    "heads": [float(x) for x in self.head_errors[i]],
                    "max_context_error": float(self.context_errors[i].max()),
                }
                for i, e in enumerate(self.layer_errors)
            ],
            "max_context_error": self.max_context_error,
        }


def _layer_errors(rec: Recording, layer: int) -> tuple[np.ndarray, np.ndarray]:
    """(H,) max abs error of the re-derived probabilities and of probs @ V, for one layer."""
    n_heads = rec.n_heads
    p = attention_probabilities(rec.q[layer], rec.k[layer], rec.scale[layer], rec.causal)
    p -= rec.probs[layer]  # (H, T, T) re-derived minus the model's own
    np.abs(p, out=p)
    head_err = p.reshape(n_heads, -1).max(axis=1)
    ctx = head_outputs(rec.probs[layer], rec.v[layer])  # (H, T, d)
    ctx -= rec.context[layer]
    np.abs(ctx, out=ctx)
    return head_err, ctx.reshape(n_heads, -1).max(axis=1)


def check_recording(rec: Recording, tolerance: float = DEFAULT_TOLERANCE,
                    threads: int | None = None) -> CheckResult:
    """Re-derive every layer's and head's probabilities from the recording's Q/K and compare.

    Also checks that each captured head output equals the model's probabilities times the
    captured values, which ties the values and the head-output capture to the same forward.
    Layers are independent, so long texts are checked on up to ``threads`` threads (default: up
    to four, one per core; numpy releases the GIL). The window passes 1 to leave a core for
    drawing.
    """
    layers = range(rec.n_layers)
    workers = min(4, os.cpu_count() or 1) if threads is None else max(1, int(threads))
    if rec.n_tokens >= 96 and rec.n_layers > 1 and workers > 1:
        with ThreadPoolExecutor(max_workers=workers) as pool:
            parts = list(pool.map(lambda layer: _layer_errors(rec, layer), layers))
    else:
        parts = [_layer_errors(rec, layer) for layer in layers]
    head_err = np.array([h for h, _ in parts]).reshape(rec.n_layers, rec.n_heads)
    ctx_err = np.array([c for _, c in parts]).reshape(rec.n_layers, rec.n_heads)
    worst = float(head_err.max()) if head_err.size else 0.0
    if not np.isfinite(worst):
        worst = float("inf")
    return CheckResult(worst, float(tolerance), head_err, ctx_err, texts=1)


def check_recordings(recs, tolerance: float = DEFAULT_TOLERANCE) -> CheckResult:
    """The check over several recordings (same model): per head, the worst over all texts."""
    result: CheckResult | None = None
    for rec in recs:
        one = check_recording(rec, tolerance)
        result = one if result is None else result.merge(one)
    if result is None:
        raise ValueError("no recordings to check")
    return result
