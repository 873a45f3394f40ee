"""Attention rollout and attention flow (Abnar & Zuidema 2020).

Both treat the network as a stack of token-mixing steps. Layer l mixes tokens with its head-mean
attention A_l (T, T), rows = query (output) tokens, columns = key (input) tokens. The residual
connection carries each token through unchanged, which Abnar & Zuidema model by the
residual-adjusted matrix

    Ã_l = 0.5 · A_l + 0.5 · I,

still row-stochastic when A_l is. *Rollout* multiplies these matrices; *flow* treats them as edge
capacities of a layered graph and solves a max-flow problem per input token.

Causal models need no special handling: the upper triangle of A_l is zero, so no rollout product
and no flow path ever runs from a later token to an earlier one.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
from scipy.sparse import csr_array
from scipy.sparse.csgraph import maximum_flow

from viewer.core.scores import LayerScores

FLOW_SCALE: float = 1e6
"""Capacities are multiplied by this and rounded to integers for scipy's max-flow solver."""

FLOW_MAX_TOKENS: int = 160
"""Default largest text (in tokens) that ``attention_flow`` accepts."""


def residual_attention(attention: np.ndarray) -> np.ndarray:
    """Ã = 0.5 · A + 0.5 · I for (..., T, T) attention (Abnar & Zuidema 2020, §3).

    For a row-stochastic A this equals (A + I) normalised to unit row sums.
    """
    a = np.asarray(attention, dtype=np.float64)
    eye = np.eye(a.shape[-1])  # (T, T)
    return 0.5 * a + 0.5 * eye  # (..., T, T)


def layer_graph(probs: np.ndarray) -> np.ndarray:
    """Residual-adjusted head-mean attention per layer: (L, H, T, T) -> (L, T, T) float64.

    Ã_l = 0.5 · mean_h A_{l,h} + 0.5 · I (Abnar & Zuidema 2020, §3).
    """
    p = np.asarray(probs, dtype=np.float64)
    if p.ndim != 4 or p.shape[2] != p.shape[3] or p.shape[0] < 1 or p.shape[1] < 1:
        raise ValueError(f"probs must be (L, H, T, T) with L, H >= 1, got {p.shape}")
    return residual_attention(p.mean(axis=1))  # (L, T, T)


def attention_rollout(probs: np.ndarray, *, all_layers: bool = False) -> np.ndarray:
    """Attention rollout (Abnar & Zuidema 2020, Eq. 1).

    R_0 = Ã_0 and R_l = Ã_l · R_{l-1}, with Ã_l = 0.5 · mean_h A_{l,h} + 0.5 · I.
    Row i of R_l says how much of token i's representation after layer l comes from each input
    token (columns); rows sum to 1.

    probs (L, H, T, T) -> R_{L-1} (T, T), or with ``all_layers`` every R_l as (L, T, T).
    """
    graph = layer_graph(probs)  # (L, T, T)
    out = np.empty_like(graph)  # (L, T, T)
    r = np.eye(graph.shape[-1])  # (T, T)
    for layer in range(graph.shape[0]):
        r = graph[layer] @ r
        out[layer] = r
    if all_layers:
        return out
    return out[-1]


def rollout_row(layers: Sequence[LayerScores], token: int) -> np.ndarray:
    """Row ``token`` of the rollout R_{L-1} (``attention_rollout``), without any T × T matrix.

    Row s of R_{L-1} = Ã_{L-1} ··· Ã_0 is e_sᵀ Ã_{L-1} ··· Ã_0, a row vector taken through the
    layers from the last to the first: r ← r Ã_l = 0.5 · r A_l + 0.5 · r, with r A_l =
    Σ_i r_i · mean_h A_{l,h}[i, :] summed block by block of rows (``viewer.core.scores``).
    Costs one pass over every layer's probabilities; (T,) float64. Each layer's float64
    copies are dropped once it is done (``LayerScores.forget``).
    """
    n = layers[0].n_tokens
    r = np.zeros(n)
    r[token] = 1.0
    for scores in reversed(layers):
        moved = np.zeros(n)  # r A_l
        weight = 1.0 / scores.n_heads
        for block in scores.blocks(own=True):
            part = r[block.rows]  # (b,)
            if part.any():
                moved[block.keys] += weight * np.einsum("b,hbs->s", part, block.p)
        r = 0.5 * moved + 0.5 * r
        scores.forget()  # one layer's float64 keys at a time
    return r


def flow_network(probs: np.ndarray, scale: float = FLOW_SCALE) -> csr_array:
    """The layered flow graph as an integer sparse capacity matrix (N, N), N = (L + 1) · T.

    Node ``l * T + j`` is token j at level l (level 0 = the input embeddings, level L = the
    output of the last layer). The edge from token j at level l to token i at level l + 1 has
    capacity round(scale · Ã_l[i, j]) (Abnar & Zuidema 2020, §3), Ã_l as in ``layer_graph``.
    Capacities that round to 0 are dropped.
    """
    graph = layer_graph(probs)  # (L, T, T)
    n_layers, t, _ = graph.shape
    caps = np.rint(graph * scale).astype(np.int64)  # (L, T, T) [l, i, j]
    if caps.size and caps.max() > np.iinfo(np.int32).max:
        raise ValueError(f"flow scale {scale} overflows 32-bit capacities")
    layer, i, j = np.nonzero(caps)
    rows = layer * t + j  # from token j at level l
    cols = (layer + 1) * t + i  # to token i at level l + 1
    n = (n_layers + 1) * t
    data = caps[layer, i, j].astype(np.int32)
    return csr_array((data, (rows, cols)), shape=(n, n))


def attention_flow(
    probs: np.ndarray,
    output_token: int,
    *,
    max_tokens: int | None = FLOW_MAX_TOKENS,
    scale: float = FLOW_SCALE,
) -> np.ndarray:
    """Attention flow into one output token (Abnar & Zuidema 2020, §3): (L, H, T, T) -> (T,).

    Entry j is the maximum flow from token j at level 0 (the input) to ``output_token`` at level
    L (after the last layer) through the layered graph of ``flow_network``, each a separate
    max-flow problem solved by ``scipy.sparse.csgraph.maximum_flow`` (Dinic's algorithm).

    scipy needs integer capacities, so every capacity Ã_l[i, j] is multiplied by ``scale``
    (default 1e6) and rounded; the flow values are divided by ``scale`` again. Rounding moves a
    cut's capacity by at most 0.5 / scale per edge in it, so by max-flow/min-cut each value is
    within (edges in a minimum cut) · 0.5 / scale of the real-valued max-flow (0.5e-6 per cut
    edge at the default scale). Values are not normalised: they lie in [0, 1] (up to that
    rounding) but need not sum to 1 over j (each token's flow is its own problem); divide by
    the sum or the maximum when a distribution or a colour scale is wanted.

    With one layer the flow equals the rollout row: the only path from j to the output is the
    single edge of capacity Ã_0[output, j].

    Flow solves T max-flow problems on (L + 1) · T nodes and up to L · T² edges, so it is
    refused above ``max_tokens`` tokens (default 160) with a ValueError; pass a larger value,
    or None, to accept longer texts.
    """
    p = np.asarray(probs)
    if p.ndim != 4:
        raise ValueError(f"probs must be (L, H, T, T), got {p.shape}")
    n_layers, _, t, _ = p.shape
    if max_tokens is not None and t > max_tokens:
        raise ValueError(
            f"attention flow over {t} tokens is too slow; the limit is {max_tokens} tokens "
            f"(pass max_tokens=None or a larger value to raise it)"
        )
    if not 0 <= output_token < t:
        raise ValueError(f"output_token {output_token} out of range for {t} tokens")
    network = flow_network(p, scale)
    sink = n_layers * t + output_token
    values = np.empty(t)  # (T,)
    for j in range(t):
        values[j] = maximum_flow(network, j, sink, method="dinic").flow_value
    return values / scale
