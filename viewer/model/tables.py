"""Per-layer tables of one checkpoint: the numbers a family's record turns into, layer by layer.

The scale of each layer's scores, its window, its soft-cap, which DeBERTa position terms the
model adds, which distinct attention module runs as which layer (ALBERT shares one), and the
score terms of one captured layer as ``viewer.core.terms.ScoreTerms``.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import torch

from viewer.core.terms import ScoreTerms
from viewer.errors import HeadlightError
from viewer.model.families import Family, Geometry, Window, config_value, deberta_terms, layer_scale
from viewer.model.recorder import Capture, LayerCapture


def layer_count(config: Any) -> int:
    """Attention layers a forward pass runs (ALBERT runs its shared groups many times)."""
    n = config_value(config, "num_hidden_layers", "n_layer", "n_layers")
    if getattr(config, "model_type", "") == "albert":
        n *= int(getattr(config, "inner_group_num", 1))
    return int(n)


def window_array(windows: list[Window], n_layers: int) -> np.ndarray | None:
    """(L, 2) int64 (before, after) per layer, -1 for an unbounded side; None without windows."""
    if len(windows) != n_layers:
        raise HeadlightError(f"config.json lists {len(windows)} layer types for {n_layers} layers")
    if all(w is None for w in windows):
        return None
    return np.array([(-1, -1) if w is None else w for w in windows], dtype=np.int64)


class LayerTables:
    """The per-layer numbers of one checkpoint."""

    def __init__(self, family: Family, config: Any, geometry: Geometry):
        self.family = family
        self.config = config
        self.n_layers = layer_count(config)
        self.scales = np.array([layer_scale(family, config, i, geometry) for i in range(self.n_layers)])
        self.windows = window_array(family.windows(config, self.n_layers), self.n_layers)
        cap = float(family.softcap(config))
        self.softcaps = np.full(self.n_layers, cap) if cap > 0 else None
        # DeBERTa: which of the position terms the model adds (shared projections compute both)
        self.position_terms = frozenset(
            t
            for t in (deberta_terms(config) if family.relative == "disentangled" else [])
            if t in ("c2p", "p2c") and getattr(config, "relative_attention", False)
        )

    def module_index(self, layer: int, n_modules: int) -> int:
        """Which of the ``n_modules`` distinct attention modules runs as ``layer``.

        ALBERT runs num_hidden_layers passes; pass p uses layer group
        p // (num_hidden_layers / num_hidden_groups), each group holding inner_group_num layers.
        """
        if n_modules == self.n_layers:
            return layer
        inner = int(getattr(self.config, "inner_group_num", 1))
        passes = int(self.config.num_hidden_layers)
        groups = int(getattr(self.config, "num_hidden_groups", 1))
        pass_index, inner_index = divmod(layer, inner)
        return int(pass_index / (passes / groups)) * inner + inner_index

    def check_module_scales(self, modules: list[tuple[str, Any]]) -> None:
        """Refuse when an attention module's own scale differs from the family rule.

        modules: (name, module) of each layer's attention module (the projections' parent)."""
        for layer, (_, parent) in enumerate(modules):
            own = getattr(parent, "scaling", None)
            if isinstance(own, (int, float)):
                rule = self.scales[layer]
                if abs(float(own) - rule) > 1e-9 * max(1.0, abs(rule)):
                    raise HeadlightError(
                        f"{self.family.name} layer {layer} scales scores by {own}, not the "
                        f"family's {rule}; refusing rather than re-deriving wrong numbers"
                    )

    def layer_terms(self, layer: LayerCapture, shared: Capture, n_tokens: int) -> ScoreTerms:
        """The score terms of one captured layer, as a one-layer ``ScoreTerms`` (index 0), with
        the relative indices cut to a text's ``n_tokens``."""
        pos_key = pos_query = bias = index = None
        if "c2p" in self.position_terms:
            pos_key = _one_layer(layer.pos_key, "position keys", layer.layer)
        if "p2c" in self.position_terms:
            pos_query = _one_layer(layer.pos_query, "position queries", layer.layer)
        if shared.bias is not None:
            bias = shared.bias.float().numpy()[None]  # (1, H, R), one table for every layer
        if pos_key is not None or pos_query is not None or bias is not None:
            if shared.rel_index is None:
                raise RuntimeError(f"{self.family.name}: relative positions were not captured")
            index = np.ascontiguousarray(shared.rel_index[:n_tokens, :n_tokens].numpy().astype(np.int64))
        i = layer.layer
        return ScoreTerms(
            rel_index=index,
            pos_key=pos_key,
            pos_query=pos_query,
            bias=bias,
            softcap=None if self.softcaps is None else self.softcaps[i : i + 1],
            window=None if self.windows is None else self.windows[i : i + 1],
        )


def _one_layer(table: torch.Tensor | None, what: str, layer: int) -> np.ndarray:
    if table is None:
        raise RuntimeError(f"{what} were not captured in layer {layer}")
    return table.float().numpy()[None]  # (1, H, R, d)


def stack_terms(layers: list[ScoreTerms]) -> ScoreTerms:
    """One recording's ScoreTerms from its layers' one-layer terms (tables stacked along L)."""
    first = layers[0]

    def stacked(name: str) -> np.ndarray | None:
        parts = [getattr(t, name) for t in layers]
        if parts[0] is None:
            return None
        return np.concatenate(parts, axis=0)

    return ScoreTerms(
        rel_index=first.rel_index,
        pos_key=stacked("pos_key"),
        pos_query=stacked("pos_query"),
        bias=None
        if first.bias is None
        else np.broadcast_to(first.bias[0], (len(layers), *first.bias.shape[1:])),
        softcap=stacked("softcap"),
        window=stacked("window"),
    )
