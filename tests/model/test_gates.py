"""Head gates on the input of each layer's attention output projection, and head importance
(the gates' gradient) against a finite difference."""

from __future__ import annotations

import pytest
import torch

from tests.model import tiny
from viewer.model import gates
from viewer.model.attribution import head_importance_sums
from viewer.model.loader import open_model


def gated_logits(loaded, batch, g):
    """The model's logits with gates ``g`` (None: no gate) on the head outputs."""
    out = loaded.forward(batch, gates=g)
    return out.logits.detach()


@pytest.fixture(scope="module", params=tiny.FAMILY_KINDS)
def loaded(request, tmp_path_factory):
    return open_model(tiny.save(tmp_path_factory.mktemp(request.param), request.param))


def test_all_ones_reproduce_the_ungated_logits_exactly(loaded):
    batch = loaded.encode(tiny.TEXTS)
    plain = gated_logits(loaded, batch, None)
    ones = gated_logits(loaded, batch, gates.ones(loaded))
    assert torch.equal(plain, ones)


def test_gating_one_head_equals_zeroing_its_slice_by_hand(loaded):
    """Reference: a hand-written pre-hook that zeroes head h's columns of the projection input."""
    layer, head = loaded.n_layers - 1, 1
    d = loaded.geometry.head_dim
    batch = loaded.encode(tiny.TEXTS)
    gated = gated_logits(loaded, batch, gates.knockout_gates(loaded, [(layer, head)]))

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
        by_hand = gated_logits(loaded, batch, None)
    finally:
        handle.remove()
    torch.testing.assert_close(gated, by_hand, rtol=0, atol=1e-6)
    plain = gated_logits(loaded, batch, None)
    assert not torch.allclose(gated, plain), "knocking out a head must change something"


def test_head_importance_equals_a_finite_difference_of_the_gate(tmp_path):
    """Michel et al. 2019, Eq. 2: I_h = |∂L/∂ξ_h| at ξ = 1 for one text, L its cross-entropy;
    reference: a central finite difference of that loss in one gate (common practice for
    checking a gradient), computed here from the gated logits."""
    loaded = open_model(tiny.save(tmp_path / "b", "bert"))
    loaded.model.double()  # float64 so that the finite difference below is meaningful
    text, target = tiny.TEXTS[1], 2
    importance = head_importance_sums(loaded, [text], [target], batch_size=1)
    assert importance.shape == (loaded.n_layers, loaded.n_heads)
    assert (importance > 0).all()
    batch = loaded.encode([text])

    def loss(layer: int, head: int, xi: float) -> float:
        g = gates.ones(loaded).double()
        g[layer, head] = xi
        return float(
            torch.nn.functional.cross_entropy(gated_logits(loaded, batch, g), torch.tensor([target]))
        )

    eps = 1e-4
    for layer, head in ((0, 2), (loaded.n_layers - 1, 0)):
        fd = (loss(layer, head, 1 + eps) - loss(layer, head, 1 - eps)) / (2 * eps)
        assert importance[layer, head] == pytest.approx(abs(fd), rel=1e-4)


def test_knockout_rejects_a_head_that_does_not_exist(tmp_path):
    loaded = open_model(tiny.save(tmp_path / "b", "bert"))
    with pytest.raises(ValueError):
        gates.knockout_gates(loaded, [(loaded.n_layers, 0)])
