"""Hooks on every layer's attention: capture Q/K/V and head outputs, and gate heads.

For each attention layer the family names up to five modules. Forward hooks on the query, key
and value projections (or on the one fused projection) capture their outputs; a forward
pre-hook on the attention output projection sees the concatenated head outputs, captures them
and, when gates are set, multiplies each head's slice by its gate. For rotary families a
pre-hook on the attention module captures the (cos, sin) tables the model itself uses, and the
rotation is applied to the captured queries and keys afterwards (``viewer.core.rotary``).

Layer indices are the order in which the hooks fire during one forward pass; this covers
ALBERT's one shared layer that runs many times.

Shapes: B batch, T padded tokens, H query heads, G key/value heads, d head size.
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
class Capture:
    """What one forward pass left behind, per layer in call order (torch tensors)."""

    q: list[torch.Tensor] = field(default_factory=list)  # each (B, H, T, d)
    k: list[torch.Tensor] = field(default_factory=list)  # each (B, G, T, d)
    v: list[torch.Tensor] = field(default_factory=list)  # each (B, G, T, d)
    context: list[torch.Tensor] = field(default_factory=list)  # each (B, H, T, d)
    rotary: list[tuple[torch.Tensor, torch.Tensor]] = field(default_factory=list)  # (B, T, d)


class AttentionHooks:
    """Installs the capture and gate hooks for one model; one instance per loaded model."""

    def __init__(self, model: nn.Module, family: Family, geometry: Geometry, n_layers: int):
        self.family = family
        self.geometry = geometry
        self.n_layers = n_layers
        self.capturing = False
        self.capture = Capture()
        # (L, H) or (B, L, H) multiplicative gates on the head outputs; None leaves them alone.
        self.gates: torch.Tensor | None = None
        self._out_calls = 0
        self._handles: list = []

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
        if family.rotary and len(rot) != len(q):
            raise HeadlightError(f"{family.name} checkpoint: rotary attention modules not found")
        self.module_names = [name for name, _ in projections]
        self.projection_modules = [m for _, m in projections]
        self.out_modules = [m for _, m in out]
        self.value_modules = [m for _, m in (qkv if family.qkv else v)]

        if family.qkv:
            for _, m in qkv:
                self._handles.append(m.register_forward_hook(self._on_qkv))
        else:
            for _, m in q:
                self._handles.append(m.register_forward_hook(self._on_proj("q", geometry.n_heads)))
            for _, m in k:
                self._handles.append(m.register_forward_hook(self._on_proj("k", geometry.n_kv_heads)))
            for _, m in v:
                self._handles.append(m.register_forward_hook(self._on_proj("v", geometry.n_kv_heads)))
        for _, m in rot:
            self._handles.append(m.register_forward_pre_hook(self._on_rotary, with_kwargs=True))
        for _, m in out:
            self._handles.append(m.register_forward_pre_hook(self._on_out))

    # -- hook bodies --------------------------------------------------------------------
    def _split_heads(self, x: torch.Tensor, n: int) -> torch.Tensor:
        b, t, _ = x.shape
        return x.detach().reshape(b, t, n, self.geometry.head_dim).transpose(1, 2)  # (B, n, T, d)

    def _on_proj(self, which: str, n_heads: int):
        def hook(module, args, output):
            if self.capturing:
                getattr(self.capture, which).append(self._split_heads(output, n_heads))

        return hook

    def _on_qkv(self, module, args, output):
        if self.capturing:
            q, k, v = output.split(self.geometry.n_heads * self.geometry.head_dim, dim=2)
            self.capture.q.append(self._split_heads(q, self.geometry.n_heads))
            self.capture.k.append(self._split_heads(k, self.geometry.n_kv_heads))
            self.capture.v.append(self._split_heads(v, self.geometry.n_kv_heads))

    def _on_rotary(self, module, args, kwargs):
        if self.capturing:
            cos, sin = kwargs["position_embeddings"]
            self.capture.rotary.append((cos.detach(), sin.detach()))

    def _on_out(self, module, args):
        layer = self._out_calls
        self._out_calls += 1
        x = args[0]  # (B, T, H*d): the heads' outputs side by side
        if self.capturing:
            self.capture.context.append(self._split_heads(x, self.geometry.n_heads))
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

    # -- control ------------------------------------------------------------------------
    def begin(self, capture: bool) -> None:
        self.capturing = capture
        self.capture = Capture()
        self._out_calls = 0

    def end(self) -> Capture:
        if self._out_calls != self.n_layers:
            raise RuntimeError(
                f"attention output projection ran {self._out_calls} times, expected {self.n_layers}"
            )
        self.capturing = False
        return self.capture

    def remove(self) -> None:
        for h in self._handles:
            h.remove()
        self._handles.clear()
