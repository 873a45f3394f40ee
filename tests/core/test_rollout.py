"""Attention rollout and attention flow (viewer.core.rollout)."""

import networkx as nx
import numpy as np
import pytest

from viewer.core.rollout import (
    FLOW_SCALE,
    attention_flow,
    attention_rollout,
    flow_network,
    layer_graph,
    residual_attention,
    rollout_row,
)
from viewer.core.scores import LayerScores
from viewer.core.terms import ScoreTerms


def _probs(rng: np.random.Generator, n_layers: int, h: int, t: int, causal: bool = False):
    a = rng.random((n_layers, h, t, t)) ** 2
    if causal:
        a = a * np.tril(np.ones((t, t)))
    return a / a.sum(axis=-1, keepdims=True)


def test_residual_equals_identity_added_then_renormalised():
    # Abnar & Zuidema 2020, §3: add I, renormalise rows; for row-stochastic A this is 0.5A + 0.5I
    rng = np.random.default_rng(0)
    a = _probs(rng, 1, 1, 5)[0, 0]
    added = a + np.eye(5)
    reference = added / added.sum(axis=-1, keepdims=True)
    np.testing.assert_allclose(residual_attention(a), reference, rtol=1e-12)


def test_uniform_attention_worked_example():
    # worked example: Ã = 0.5U + 0.5I and U·U = U, so Ã^L = 0.5^L I + (1 - 0.5^L) U;
    # n = 4, L = 2: diagonal 0.25 + 0.75/4 = 0.4375, off-diagonal 0.75/4 = 0.1875
    probs = np.full((2, 3, 4, 4), 0.25)
    r = attention_rollout(probs)
    assert r.shape == (4, 4)
    np.testing.assert_allclose(np.diag(r), 0.4375, rtol=1e-12)
    np.testing.assert_allclose(r[~np.eye(4, dtype=bool)], 0.1875, rtol=1e-12)


def test_rollout_is_product_of_layer_matrices():
    # Abnar & Zuidema 2020, Eq. 1: R_l = Ã_l R_{l-1}, written out as an explicit product here
    rng = np.random.default_rng(1)
    probs = _probs(rng, 3, 2, 5)
    mats = [0.5 * probs[i].mean(axis=0) + 0.5 * np.eye(5) for i in range(3)]
    all_layers = attention_rollout(probs, all_layers=True)
    assert all_layers.shape == (3, 5, 5)
    np.testing.assert_allclose(all_layers[0], mats[0])
    np.testing.assert_allclose(all_layers[1], mats[1] @ mats[0])
    np.testing.assert_allclose(all_layers[2], mats[2] @ mats[1] @ mats[0])
    np.testing.assert_allclose(attention_rollout(probs), all_layers[2])
    np.testing.assert_allclose(all_layers.sum(axis=-1), 1.0)  # rows stay stochastic


@pytest.mark.parametrize("causal", [False, True])
def test_rollout_row_by_blocks_is_the_row_of_the_product(causal):
    """rollout_row (row vector through the layers, block by block, from Q/K) equals the row of
    the explicit product of Abnar & Zuidema 2020, Eq. 1, over the same layers' dense
    probabilities; and each layer's float64 keys are dropped once it is done."""
    rng = np.random.default_rng(3)
    n_layers, h, g, t, d = 3, 4, 2, 9, 5
    layers = [
        LayerScores(
            rng.normal(size=(h, t, d)).astype(np.float32),
            rng.normal(size=(g, t, d)).astype(np.float32),
            0.5,
            causal,
            ScoreTerms(),
            0,
        )
        for _ in range(n_layers)
    ]
    probs = np.stack([np.stack([s.head(i) for i in range(h)]) for s in layers])  # (L, H, T, T)
    for s in layers:
        s.forget()
    token = t - 2
    got = rollout_row(layers, token)
    np.testing.assert_allclose(got, attention_rollout(probs)[token], rtol=1e-12, atol=1e-15)
    assert all(not s._k64 for s in layers)


def test_flow_equals_rollout_at_first_layer():
    # Abnar & Zuidema 2020, §4: with a single layer flow and rollout coincide (one edge per path)
    rng = np.random.default_rng(2)
    probs = _probs(rng, 1, 4, 6)
    rollout = attention_rollout(probs)
    for out in (0, 3):
        flow = attention_flow(probs, out)
        np.testing.assert_allclose(flow, rollout[out], atol=1e-6)


def _networkx_flow(probs: np.ndarray, out: int) -> np.ndarray:
    """Outside reference: the same layered graph in networkx with real-valued capacities."""
    graph = layer_graph(probs)
    n_layers, t, _ = graph.shape
    g = nx.DiGraph()
    for layer in range(n_layers):
        for i in range(t):
            for j in range(t):
                if graph[layer, i, j] > 0:
                    g.add_edge((layer, j), (layer + 1, i), capacity=float(graph[layer, i, j]))
    values = []
    for j in range(t):
        if (0, j) in g and (n_layers, out) in g:
            values.append(nx.maximum_flow_value(g, (0, j), (n_layers, out)))
        else:
            values.append(0.0)
    return np.array(values)


@pytest.mark.parametrize("seed,n_layers,t,causal", [(3, 2, 4, False), (4, 3, 5, False), (5, 3, 6, True)])
def test_flow_matches_networkx(seed, n_layers, t, causal):
    rng = np.random.default_rng(seed)
    probs = _probs(rng, n_layers, 2, t, causal)
    out = t - 1 if causal else 0
    ours = attention_flow(probs, out)
    ref = _networkx_flow(probs, out)
    # integer capacities at scale 1e6 move a cut's capacity by <= 0.5e-6 per edge in the cut;
    # n_layers * t * 1e-6 is a generous bound at these sizes
    np.testing.assert_allclose(ours, ref, atol=n_layers * t / FLOW_SCALE)
    # more than one layer: flow is genuinely different from rollout (a real max-flow, not a copy)
    assert not np.allclose(ours, attention_rollout(probs)[out], atol=1e-3)


def test_flow_network_edges():
    # node l * T + j is token j at level l; edge (l, j) -> (l + 1, i) carries Ã_l[i, j]
    rng = np.random.default_rng(6)
    probs = _probs(rng, 2, 1, 3)
    net = flow_network(probs).toarray()
    graph = layer_graph(probs)
    assert net.shape == (9, 9)
    np.testing.assert_array_equal(net[0:3, 3:6], np.rint(graph[0].T * FLOW_SCALE))
    np.testing.assert_array_equal(net[3:6, 6:9], np.rint(graph[1].T * FLOW_SCALE))
    assert net[3:6, 0:3].sum() == 0 and net[0:3, 6:9].sum() == 0  # only upward, level to level


def test_causal_flow_does_not_reach_back():
    # causal mask: token j > out cannot influence out at any level
    rng = np.random.default_rng(7)
    probs = _probs(rng, 2, 2, 5, causal=True)
    flow = attention_flow(probs, 2)
    assert (flow[3:] == 0).all() and (flow[:3] > 0).all()


def test_flow_refuses_long_texts():
    probs = np.full((1, 1, 5, 5), 0.2)
    with pytest.raises(ValueError, match="limit is 4 tokens"):
        attention_flow(probs, 0, max_tokens=4)
    assert attention_flow(probs, 0, max_tokens=None).shape == (5,)
