"""Head gates: knock heads out, or differentiate the prediction with respect to each head.

transformers 5 has no ``head_mask`` argument, so Headlight puts its own multiplicative gate ξ_h
on each head's output where it enters the attention output projection (the hook lives in
``viewer.model.recorder``). With every ξ_h = 1 the model is untouched; ξ_h = 0 removes head h's
contribution; ∂loss/∂ξ_h at ξ = 1 is the head importance of Michel et al. 2019, Eq. 2.
"""

from __future__ import annotations

from collections.abc import Iterable

import torch

from viewer.model.loader import LoadedModel


def ones(loaded: LoadedModel, requires_grad: bool = False) -> torch.Tensor:
    """(L, H) gates of 1: the untouched model."""
    return torch.ones(loaded.n_layers, loaded.n_heads, requires_grad=requires_grad)


def knockout_gates(loaded: LoadedModel, heads: Iterable[tuple[int, int]]) -> torch.Tensor:
    """(L, H) gates with the listed (layer, head) pairs set to 0 and the rest to 1."""
    gates = ones(loaded)
    for layer, head in heads:
        if not (0 <= layer < loaded.n_layers and 0 <= head < loaded.n_heads):
            raise ValueError(f"no head layer {layer} · head {head} in this model")
        gates[layer, head] = 0.0
    return gates
