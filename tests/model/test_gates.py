"""Head gates on the input of each layer's attention output projection."""

from __future__ import annotations

import pytest
import torch

from tests.model import tiny
from viewer.model import gates
from viewer.model.loader import open_model


@pytest.fixture(scope="module", params=tiny.FAMILY_KINDS)
def loaded(request, tmp_path_factory):
    return open_model(tiny.save(tmp_path_factory.mktemp(request.param), request.param))


def test_all_ones_reproduce_the_ungated_logits_exactly(loaded):
    batch = loaded.encode(tiny.TEXTS)
    plain = gates.gated_logits(loaded, batch, None)
    ones = gates.gated_logits(loaded, batch, gates.ones(loaded))
    assert torch.equal(plain, ones)


def test_gating_one_head_equals_zeroing_its_slice_by_hand(loaded):
    """Reference: a hand-written pre-hook that zeroes head h's columns of the projection input."""
    layer, head = loaded.n_layers - 1, 1
    d = loaded.geometry.head_dim
    batch = loaded.encode(tiny.TEXTS)
    gated = gates.gated_logits(loaded, batch, gates.knockout_gates(loaded, [(layer, head)]))

    # ALBERT's test config has one shared layer module that runs every pass.
    target = loaded.hooks.out_modules[layer % len(loaded.hooks.out_modules)]
    calls = {"n": 0}

    def zero_slice(module, args):
        calls["n"] += 1
        if loaded.family.shared_layers and calls["n"] != layer + 1:
            return None  # ALBERT: only the chosen pass through the shared layer
        x = args[0].clone()
        x[..., head * d : (head + 1) * d] = 0.0
        return (x, *args[1:])

    handle = target.register_forward_pre_hook(zero_slice)
    try:
        by_hand = gates.gated_logits(loaded, batch, None)
    finally:
        handle.remove()
    torch.testing.assert_close(gated, by_hand, rtol=0, atol=1e-6)
    plain = gates.gated_logits(loaded, batch, None)
    assert not torch.allclose(gated, plain), "knocking out a head must change something"


def test_gate_gradients_exist_for_every_head(tmp_path):
    loaded = open_model(tiny.save(tmp_path / "b", "bert"))
    loaded.model.double()  # float64 so that the finite difference below is meaningful
    batch = loaded.encode(tiny.TEXTS)
    grad = gates.gate_gradients(loaded, batch, torch.tensor([0, 1, 2]))
    assert grad.shape == (loaded.n_layers, loaded.n_heads)
    assert torch.isfinite(grad).all() and (grad.abs() > 0).all()
    # Finite-difference reference on one gate (common practice for checking a gradient).
    eps = 1e-4
    g = gates.ones(loaded).double()
    g[0, 2] += eps
    plus = torch.nn.functional.cross_entropy(
        gates.gated_logits(loaded, batch, g), torch.tensor([0, 1, 2]), reduction="sum"
    )
    g[0, 2] -= 2 * eps
    minus = torch.nn.functional.cross_entropy(
        gates.gated_logits(loaded, batch, g), torch.tensor([0, 1, 2]), reduction="sum"
    )
    assert float(grad[0, 2]) == pytest.approx(float(plus - minus) / (2 * eps), rel=1e-4)


def test_knockout_rejects_a_head_that_does_not_exist(tmp_path):
    loaded = open_model(tiny.save(tmp_path / "b", "bert"))
    with pytest.raises(ValueError):
        gates.knockout_gates(loaded, [(loaded.n_layers, 0)])
