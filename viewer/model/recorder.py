"""Hooks on every layer's attention: capture Q/K/V, score terms and head outputs, and gate heads.

For each attention layer the family names the modules to hook. Forward hooks on the query, key
and value projections (or on the one fused projection, or on the q/k norms that follow them)
capture their outputs; a forward pre-hook on the attention output projection sees the
concatenated head outputs, captures them and, when gates are set, multiplies each head's slice
by its gate. For rotary families a pre-hook on the attention module captures the (cos, sin)
tables the model itself uses in that layer, and the rotation is applied to the captured queries
and keys afterwards (``viewer.core.rotary``).

Relative-position terms are captured from the model's own run as well: for DeBERTa the bucketed
relative positions the attention module receives and the relative embeddings projected to keys
and queries (the outputs of the position projections, or the second call of the shared q/k
projections on the relative embedding table); for MPNet the bucket indices fed to the bias
embedding and its table.

Layer indices are the order in which the hooks fire during one forward pass; this covers
ALBERT's one shared layer that runs many times.

A layer's captures are complete when its output projection is about to run, so the hooks hand
them over there, one ``LayerCapture`` at a time, to the run's *sink* and keep nothing: a long
text never holds more than one layer's torch tensors (``viewer.model.runs``).

Shapes: B batch, T padded tokens, H query heads, G key/value heads, d head size, R table rows.
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field

import torch
from torch import nn

from viewer.errors import HeadlightError
from viewer.model.families import Family, Geometry


def _find(model: nn.Module, pattern: str | None) -> list[tuple[str, nn.Module]]:
    if pattern is None:
        return []
    rx = re.compile(pattern)
    return [(name, m) for name, m in model.named_modules() if rx.search(name)]


@dataclass
class LayerCapture:
    """What one layer left behind in one forward pass (torch tensors, the whole batch)."""

    layer: int
    q: torch.Tensor  # (B, H, T, d) before rotary
    k: torch.Tensor  # (B, G, T, d) before rotary
    v: torch.Tensor  # (B, G, T, d)
    context: torch.Tensor  # (B, H, T, d) the heads' outputs entering the output projection
    rotary: tuple[torch.Tensor, torch.Tensor] | None = None  # (cos, sin), each (B or 1, T, r)
    pos_key: torch.Tensor | None = None  # (H, R, d) DeBERTa Kʳ
    pos_query: torch.Tensor | None = None  # (H, R, d) DeBERTa Qʳ


@dataclass
class Capture:
    """The per-forward captures that every layer shares, and the layer being filled."""

    rel_index: torch.Tensor | None = None  # (T, T) table row of each (query, key) pair
    bias: torch.Tensor | None = None  # (H, R) MPNet relative bias table
    pending: dict = field(default_factory=dict)  # the current layer's parts, by name


class AttentionHooks:
    """Installs the capture and gate hooks for one model; one instance per loaded model."""

    def __init__(self, model: nn.Module, family: Family, geometry: Geometry, n_layers: int):
        self.family = family
        self.geometry = geometry
        self.n_layers = n_layers
        self.sink = None  # called with each LayerCapture while capturing
        self.capture = Capture()
        # (L, H) or (B, L, H) multiplicative gates on the head outputs; None leaves them alone.
        self.gates: torch.Tensor | None = None
        self._out_calls = 0
        self._handles: list = []
        self._relative_table: torch.Tensor | None = None  # DeBERTa's rel_embeddings this layer

        q, k, v = _find(model, family.q), _find(model, family.k), _find(model, family.v)
        qkv, out = _find(model, family.qkv), _find(model, family.out)
        rot = _find(model, family.rotary)
        projections = qkv if family.qkv else q
        if not projections or not out or len(out) != len(projections):
            raise HeadlightError(
                f"{family.name} checkpoint does not have the attention modules Headlight expects "
                f"({len(projections)} query projections, {len(out)} output projections found)"
            )
        if not family.qkv and not (len(q) == len(k) == len(v)):
            raise HeadlightError(f"{family.name} checkpoint has unequal numbers of Q/K/V modules")
        if family.rotary and len(rot) != len(projections):
            raise HeadlightError(f"{family.name} checkpoint: rotary attention modules not found")
        self.module_names = [name for name, _ in projections]
        self.projection_modules = [m for _, m in projections]
        self.out_modules = [m for _, m in out]
        self.value_modules = [m for _, m in (qkv if family.qkv else v)]

        hook = self._handles.append
        if family.qkv:
            for _, m in qkv:
                hook(m.register_forward_hook(self._on_qkv))
        else:
            for _, m in q:
                hook(m.register_forward_hook(self._on_proj("q", geometry.n_heads, True)))
            for _, m in k:
                hook(m.register_forward_hook(self._on_proj("k", geometry.n_kv_heads, True)))
            for _, m in v:
                hook(m.register_forward_hook(self._on_proj("v", geometry.n_kv_heads, False)))
        for _, m in rot:
            hook(m.register_forward_pre_hook(self._on_rotary, with_kwargs=True))
        for _, m in out:
            hook(m.register_forward_pre_hook(self._on_out))
        if family.relative == "disentangled":
            for _, m in _find(model, family.relative_module):
                hook(m.register_forward_pre_hook(self._on_disentangled, with_kwargs=True))
            for _, m in _find(model, family.pos_k):
                hook(m.register_forward_hook(self._on_position("pos_key")))
            for _, m in _find(model, family.pos_q):
                hook(m.register_forward_hook(self._on_position("pos_query")))
        elif family.relative == "bias":
            for _, m in _find(model, family.relative_module):
                hook(m.register_forward_hook(self._on_bias))

    # -- hook bodies --------------------------------------------------------------------
    def _split_heads(self, x: torch.Tensor, n: int, layout: str = "flat") -> torch.Tensor:
        """(B, n, T, d) from a projection output in the given layout."""
        x = x.detach()
        if layout == "bhtd":
            return x
        if layout == "bthd":
            return x.transpose(1, 2)
        b, t, _ = x.shape
        return x.reshape(b, t, n, self.geometry.head_dim).transpose(1, 2)

    def _is_relative_table(self, x: torch.Tensor) -> bool:
        """Whether a projection input is DeBERTa's relative embedding table (shared q/k)."""
        table = self._relative_table
        return (
            table is not None
            and x.data_ptr() == table.data_ptr()
            and x.dim() == 3
            and x.shape[0] == 1
            and x.shape[-1] == table.shape[-1]
        )

    @property
    def capturing(self) -> bool:
        return self.sink is not None

    def _keep(self, name: str, value) -> None:
        if name in self.capture.pending:
            raise RuntimeError(f"{self.family.name}: {name} captured twice in layer {self._out_calls}")
        self.capture.pending[name] = value

    def _on_proj(self, which: str, n_heads: int, query_or_key: bool):
        layout = self.family.qk_layout if query_or_key else "flat"
        position = {"q": "pos_query", "k": "pos_key"}.get(which)

        def hook(module, args, output):
            if not self.capturing:
                return
            if position and self._is_relative_table(args[0]):
                self._keep(position, self._position_heads(output))
                return
            self._keep(which, self._split_heads(output, n_heads, layout))

        return hook

    def _on_qkv(self, module, args, output):
        if not self.capturing:
            return
        h, g, d = self.geometry.n_heads, self.geometry.n_kv_heads, self.geometry.head_dim
        if self.family.qkv_layout == "per_head":  # (B, T, H, 3d): [q k v] side by side per head
            b, t, _ = output.shape
            q, k, v = output.detach().reshape(b, t, h, 3 * d).transpose(1, 2).split(d, dim=-1)
        else:
            q, k, v = output.split([h * d, g * d, g * d], dim=2)
            q, k, v = self._split_heads(q, h), self._split_heads(k, g), self._split_heads(v, g)
        self._keep("q", q)
        self._keep("k", k)
        self._keep("v", v)

    def _on_rotary(self, module, args, kwargs):
        if self.capturing:
            tables = kwargs.get("position_embeddings")
            if tables is None:
                raise RuntimeError(f"{self.family.name} attention got no position_embeddings")
            cos, sin = tables
            self._keep("rotary", (cos.detach(), sin.detach()))

    def _position_heads(self, x: torch.Tensor) -> torch.Tensor:
        """(H, R, d) from a position projection output (1, R, H·d)."""
        return self._split_heads(x, self.geometry.n_heads)[0]

    def _on_disentangled(self, module, args, kwargs):
        """DeBERTa: the relative positions and embedding table the attention module receives."""
        if not self.capturing:
            return
        rel, table = kwargs.get("relative_pos"), kwargs.get("rel_embeddings")
        if rel is None or table is None:
            self._relative_table = None
            return
        self._relative_table = table
        if self.capture.rel_index is None:
            span = int(module.pos_ebd_size)
            # the row of the 2·span position tables each pair reads: clamp(δ + span, 0, 2span − 1)
            index = torch.clamp(rel.detach().reshape(rel.shape[-2], rel.shape[-1]) + span, 0, 2 * span - 1)
            self.capture.rel_index = index

    def _on_position(self, which: str):
        def hook(module, args, output):
            if self.capturing:
                self._keep(which, self._position_heads(output))

        return hook

    def _on_bias(self, module, args, output):
        """MPNet: the bucket indices (T, T) the bias embedding is looked up with, and its table."""
        if self.capturing:
            self.capture.rel_index = args[0].detach()
            self.capture.bias = module.weight.detach().T  # (H, R)

    def _on_out(self, module, args):
        layer = self._out_calls
        self._out_calls += 1
        x = args[0]  # (B, T, H*d): the heads' outputs side by side
        if self.capturing:
            self._hand_over(layer, self._split_heads(x, self.geometry.n_heads))
        if self.gates is None:
            return None
        b, t, _ = x.shape
        h, d = self.geometry.n_heads, self.geometry.head_dim
        if self.gates.dim() == 3:  # (B, L, H): one set of gates per text of the batch
            gate = self.gates[:, layer].to(x.dtype).view(b, 1, h, 1)
        else:  # (L, H): the same gates for the whole batch
            gate = self.gates[layer].to(x.dtype).view(1, 1, h, 1)
        gated = (x.reshape(b, t, h, d) * gate).reshape(b, t, h * d)
        return (gated, *args[1:])

    def _hand_over(self, layer: int, context: torch.Tensor) -> None:
        """The layer is complete: give its captures to the sink and forget them."""
        parts = self.capture.pending
        self.capture.pending = {}
        missing = [name for name in ("q", "k", "v") if name not in parts]
        if missing:
            raise RuntimeError(f"{self.family.name} layer {layer}: {', '.join(missing)} not captured")
        if self.family.rotary and "rotary" not in parts:
            raise RuntimeError(f"{self.family.name} layer {layer}: rotary tables not captured")
        self.sink(LayerCapture(layer=layer, context=context, **parts))

    # -- control ------------------------------------------------------------------------
    def begin(self, sink=None) -> None:
        """Start a forward pass; with a ``sink``, each layer's captures go to it."""
        self.sink = sink
        self.capture = Capture()
        self._out_calls = 0
        self._relative_table = None

    def end(self) -> Capture:
        if self._out_calls != self.n_layers:
            raise RuntimeError(
                f"attention output projection ran {self._out_calls} times, expected {self.n_layers}"
            )
        self.sink = None
        self._relative_table = None
        return self.capture

    def stop(self) -> None:
        """Leave capture mode (after a failed pass too)."""
        self.sink = None
        self.capture = Capture()
        self._relative_table = None

    def remove(self) -> None:
        for h in self._handles:
            h.remove()
        self._handles.clear()
