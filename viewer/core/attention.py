"""Attention re-derived in float64 from the captured queries, keys and score terms.

The re-derivation check is the proof that a recording is right: from the captured per-head
queries Q and keys K, and the score terms the family adds (``viewer.core.terms``), we recompute

    P = softmax(Q Kᵀ · scale + terms + M)              (Vaswani et al. 2017, Eq. 1)

where M is 0 where a query may see a key and −∞ elsewhere (causal rows see keys j <= i, windowed
rows only the keys inside their window), and compare P with the probabilities the model itself
produced. Agreement to ~1e-6 means that the hooks captured the right tensors, in the right head
order, with the right scale, terms and mask; any mistake in the family map (a wrong split of a
fused projection, a missing rotary step, a wrong scale rule, a term left out) shows up as a large
error. The terms are defined in ``docs/families.md``.

The check works through each layer in blocks of query rows, so the float64 scores of one block
stay in the processor's cache instead of a full (H, T, T) tensor going through memory several
times; grouped key/value heads are used through reshaped views, never repeated copies.
"""

from __future__ import annotations

import os
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass

import numpy as np

from viewer.core.recording import Recording
from viewer.core.terms import (
    ScoreTerms,
    add_relative_terms,
    p2c_table,
    soft_cap,
    table_rows,
    visible_rows,
)

DEFAULT_TOLERANCE = 1e-5

# float64 entries of one block of scores (H, rows, T): 128k entries = 1 MiB, which stays in a
# core's L2 cache (measured in tests/benchmarks/bench_recording.py against whole-layer tensors)
BLOCK_ENTRIES = 1 << 17
# multiply-adds of one matrix product that OpenBLAS still runs on the calling thread: the check
# has its own threads (one per layer), and BLAS threads left spinning after a product slow the
# next model forward by 2-3x (measured in tests/benchmarks/bench_families.py)
GEMM_SINGLE_THREAD = 1 << 18


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


def _grouped(x: np.ndarray, groups: int) -> np.ndarray:
    """(H, n, ...) -> (G, H/G · n, ...): query heads h = g · H/G + m side by side per group."""
    return x.reshape(x.shape[0] // groups, groups * x.shape[1], *x.shape[2:])


class _LayerScores:
    """Float64 scores of one layer, block by block of query rows (terms per viewer.core.terms)."""

    def __init__(
        self, q: np.ndarray, k: np.ndarray, scale: float, causal: bool, terms: ScoreTerms, layer: int
    ):
        self.n_heads, self.n_tokens = q.shape[0], q.shape[1]
        if self.n_heads % k.shape[0]:
            raise ValueError(f"{self.n_heads} query heads cannot share {k.shape[0]} key heads")
        self.groups = self.n_heads // k.shape[0]  # query heads per key/value head
        self.q = np.asarray(q, dtype=np.float64) * float(scale)  # (H, T, d); scaling q is cheaper
        self.k_t = np.asarray(k, dtype=np.float64).transpose(0, 2, 1)  # (G, d, T)
        self.causal, self.terms, self.layer = causal, terms, layer
        self.window = terms.layer_window(layer)
        self.cap = terms.layer_cap(layer)
        self.p2c = p2c_table(terms, layer, k, scale, self.n_heads, GEMM_SINGLE_THREAD)

    def rows(self, rows: slice) -> np.ndarray:
        """(H, rows, T) the softmax probabilities of query rows ``rows``."""
        qb = _grouped(np.ascontiguousarray(self.q[:, rows]), self.groups)  # (G, H/G·b, d)
        s = np.matmul(qb, self.k_t).reshape(self.n_heads, -1, self.n_tokens)  # (H, b, T)
        add_relative_terms(s, self.terms, self.layer, rows, self.q, self.p2c)
        soft_cap(s, self.cap)
        visible = visible_rows(rows, self.n_tokens, self.causal, self.window)
        if visible is not None:
            np.copyto(s, -np.inf, where=~visible)
        _softmax_in_place(s)
        return s


# exp of float64 scores within ±SAFE_EXP neither overflows nor loses a row to underflow, so
# the row maximum need not be subtracted there (it changes nothing mathematically)
SAFE_EXP = 600.0


def _softmax_in_place(s: np.ndarray) -> None:
    """Softmax over the last axis of float64 ``s``, in place (see ``viewer.core.softmax``)."""
    m = s.max(axis=-1, keepdims=True)
    m[~np.isfinite(m)] = 0.0  # a row that sees no key stays all zero
    if m.max() > SAFE_EXP or m.min() < -SAFE_EXP:
        s -= m
    np.exp(s, out=s)
    total = s.sum(axis=-1, keepdims=True)
    total[total == 0] = 1.0
    np.reciprocal(total, out=total)
    s *= total


def _row_blocks(n_rows: int, row_entries: int, row_products: int = 0):
    """Slices of query rows, as equal as can be, of at most BLOCK_ENTRIES entries each, and
    (when ``row_products`` = multiply-adds per row of one matrix product is given) small enough
    that OpenBLAS runs each product on the calling thread (below GEMM_SINGLE_THREAD)."""
    most = max(1, BLOCK_ENTRIES // max(1, row_entries))
    if row_products:
        most = min(most, max(1, GEMM_SINGLE_THREAD // row_products))
    count = -(-n_rows // most)  # ceil
    size = -(-n_rows // max(1, count))
    for start in range(0, n_rows, size):
        yield slice(start, min(n_rows, start + size))


def attention_probabilities(
    q: np.ndarray, k: np.ndarray, scale: float, causal: bool, terms: ScoreTerms | None = None, layer: int = 0
) -> np.ndarray:
    """softmax(Q Kᵀ · scale + terms + M) in float64 for one layer.

    q: (H, T, d) queries; k: (G, T, d) keys (G divides H); ``terms`` the recording's score
    terms, of which layer ``layer`` is used. Returns (H, T, T).
    """
    scores = _LayerScores(q, k, scale, causal, terms or ScoreTerms(), layer)
    h, t = q.shape[0], q.shape[1]
    out = np.empty((h, t, t))
    for rows in _row_blocks(t, h * t):
        out[:, rows] = scores.rows(rows)
    return out


def head_outputs(probs: np.ndarray, v: np.ndarray) -> np.ndarray:
    """Each head's context vectors probs @ V: probs (H, T, T), v (G, T, d) -> (H, T, d)."""
    groups = probs.shape[0] // v.shape[0]
    p = _grouped(np.asarray(probs, dtype=np.float64), groups)  # (G, H/G·T, T)
    out = np.matmul(p, np.asarray(v, dtype=np.float64))  # (G, H/G·T, d)
    return out.reshape(probs.shape[0], probs.shape[1], -1)


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
        return bool(self.max_abs_error <= self.tolerance and self.max_context_error <= self.tolerance)

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
    n_heads, t = rec.n_heads, rec.n_tokens
    scores = _LayerScores(rec.q[layer], rec.k[layer], rec.scale[layer], rec.causal, rec.terms, layer)
    v = np.asarray(rec.v[layer], dtype=np.float64)  # (G, T, d)
    own, context = rec.probs[layer], rec.context[layer]  # (H, T, T), (H, T, d)
    prob_err = np.zeros(n_heads)
    ctx_err = np.zeros(n_heads)
    d = rec.q.shape[-1]
    # multiply-adds per query row of the largest product: q·kᵀ, probs·v (H/G·T·d), c2p (R·d)
    row_products = max(scores.groups * t * d, table_rows(rec.terms) * d)
    for rows in _row_blocks(t, n_heads * t, row_products):
        mine = own[:, rows].astype(np.float64)  # (H, b, T) the model's own, in float64
        p = scores.rows(rows)  # (H, b, T)
        p -= mine  # re-derived minus the model's own
        np.abs(p, out=p)
        np.maximum(prob_err, p.reshape(n_heads, -1).max(axis=1), out=prob_err)
        # probs @ V from the model's own probabilities, against the captured head outputs
        ctx = np.matmul(_grouped(mine, scores.groups), v).reshape(n_heads, -1, v.shape[-1])
        ctx -= context[:, rows]
        np.abs(ctx, out=ctx)
        np.maximum(ctx_err, ctx.reshape(n_heads, -1).max(axis=1), out=ctx_err)
    return prob_err, ctx_err


def check_recording(
    rec: Recording, tolerance: float = DEFAULT_TOLERANCE, threads: int | None = None
) -> CheckResult:
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
