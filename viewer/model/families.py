"""Architecture families: where each architecture keeps its attention, as declarative records.

A family says which modules produce the queries, keys and values (or one fused projection that
is split), which module is the attention output projection (whose *input* is the concatenation of
the head outputs, where the head gates sit), how the scores are scaled, whether the mask is
causal, whether rotary positions are applied, and how many key/value heads there are.

Modules are found by regular expressions over ``model.named_modules()`` names, and a layer's
index is the order in which the attention of that layer runs during a forward pass. That order
is the same as the module order for ordinary stacks and it also covers ALBERT, whose one shared
layer runs ``num_hidden_layers`` times.

Anything in a config that would change the attention scores in a way a family does not model is
refused by the family's ``refuse`` function at open time, so that the re-derivation check can
never pass on numbers it did not really re-derive.

To add a family: write a ``Family(...)`` record below, add it to ``FAMILIES``, and add the tiny
random model of that architecture to ``tests/model/test_families.py``. See DEVELOPERS.md.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

from viewer.errors import HeadlightError


def _get(config: Any, *names: str, default: Any = None) -> Any:
    for name in names:
        value = getattr(config, name, None)
        if value is not None:
            return value
    return default


@dataclass(frozen=True)
class Geometry:
    """Head layout of one checkpoint: H query heads, G key/value heads, d head size."""

    n_heads: int
    n_kv_heads: int
    head_dim: int

    @property
    def kv_groups(self) -> int:
        return self.n_heads // self.n_kv_heads


@dataclass(frozen=True)
class Family:
    name: str
    model_types: tuple[str, ...]
    q: str | None  # regex of the query projection modules (None when fused)
    k: str | None
    v: str | None
    qkv: str | None  # regex of a fused q|k|v projection, split in that order along the last axis
    out: str  # regex of the attention output projection (its input carries the head outputs)
    causal: bool
    rotary: str | None = None  # regex of the attention module receiving (cos, sin) position kwargs
    scale: Callable[[Any, int, Geometry], float] = lambda config, layer, g: g.head_dim**-0.5
    geometry: Callable[[Any], Geometry] | None = None
    refuse: Callable[[Any], str | None] = lambda config: None
    shared_layers: bool = False

    def head_geometry(self, config: Any) -> Geometry:
        if self.geometry is not None:
            return self.geometry(config)
        hidden = _get(config, "hidden_size", "dim", "n_embd")
        heads = _get(config, "num_attention_heads", "n_heads", "n_head")
        if hidden % heads:
            raise HeadlightError(
                f"hidden size {hidden} is not divisible by {heads} attention heads in config.json"
            )
        return Geometry(heads, heads, hidden // heads)


# -- refusals: config features that change attention scores in ways we do not model ----------


def _refuse_encoder(config: Any) -> str | None:
    kind = getattr(config, "position_embedding_type", "absolute") or "absolute"
    if kind != "absolute":
        return f"position_embedding_type={kind!r} adds relative-position score terms"
    if getattr(config, "is_decoder", False) or getattr(config, "add_cross_attention", False):
        return "encoder configured as a decoder (is_decoder / add_cross_attention)"
    return None


def _refuse_gpt2(config: Any) -> str | None:
    if getattr(config, "add_cross_attention", False):
        return "cross-attention layers (add_cross_attention)"
    return None


def _refuse_llama(config: Any) -> str | None:
    rope = getattr(config, "rope_parameters", None) or getattr(config, "rope_scaling", None) or {}
    if isinstance(rope, dict):
        kind = rope.get("rope_type", rope.get("type", "default"))
        if kind not in (None, "default"):
            return f"rotary scaling rope_type={kind!r}"
    for name in ("attn_logit_softcapping", "sliding_window"):
        if getattr(config, name, None):
            return f"{name} changes the attention scores"
    return None


def _gpt2_scale(config: Any, layer: int, g: Geometry) -> float:
    """GPT-2's rule: 1/sqrt(d) when scale_attn_weights, further 1/(layer+1) when asked."""
    scale = g.head_dim**-0.5 if getattr(config, "scale_attn_weights", True) else 1.0
    if getattr(config, "scale_attn_by_inverse_layer_idx", False):
        scale /= float(layer + 1)
    return scale


def _llama_geometry(config: Any) -> Geometry:
    heads = config.num_attention_heads
    kv = getattr(config, "num_key_value_heads", None) or heads
    head_dim = getattr(config, "head_dim", None) or config.hidden_size // heads
    if heads % kv:
        raise HeadlightError(f"{heads} attention heads cannot share {kv} key/value heads evenly")
    return Geometry(heads, kv, head_dim)


def _albert_layers(prefix: str) -> str:
    return rf"(^|\.)encoder\.albert_layer_groups\.\d+\.albert_layers\.\d+\.attention\.{prefix}$"


def _bert_like(name: str, model_types: tuple[str, ...]) -> Family:
    layer = r"(^|\.)encoder\.layer\.\d+\.attention\."
    return Family(
        name=name,
        model_types=model_types,
        q=layer + r"self\.query$",
        k=layer + r"self\.key$",
        v=layer + r"self\.value$",
        qkv=None,
        out=layer + r"output\.dense$",
        causal=False,
        refuse=_refuse_encoder,
    )


BERT = _bert_like("BERT", ("bert",))
ROBERTA = _bert_like("RoBERTa", ("roberta",))
ELECTRA = _bert_like("ELECTRA", ("electra",))

DISTILBERT = Family(
    name="DistilBERT",
    model_types=("distilbert",),
    q=r"(^|\.)transformer\.layer\.\d+\.attention\.q_lin$",
    k=r"(^|\.)transformer\.layer\.\d+\.attention\.k_lin$",
    v=r"(^|\.)transformer\.layer\.\d+\.attention\.v_lin$",
    qkv=None,
    out=r"(^|\.)transformer\.layer\.\d+\.attention\.out_lin$",
    causal=False,
)

ALBERT = Family(
    name="ALBERT",
    model_types=("albert",),
    q=_albert_layers("query"),
    k=_albert_layers("key"),
    v=_albert_layers("value"),
    qkv=None,
    out=_albert_layers("dense"),
    causal=False,
    refuse=_refuse_encoder,
    shared_layers=True,
)

GPT2 = Family(
    name="GPT-2",
    model_types=("gpt2",),
    q=None,
    k=None,
    v=None,
    qkv=r"(^|\.)h\.\d+\.attn\.c_attn$",
    out=r"(^|\.)h\.\d+\.attn\.c_proj$",
    causal=True,
    scale=_gpt2_scale,
    refuse=_refuse_gpt2,
)

LLAMA = Family(
    name="Llama",
    model_types=("llama",),
    q=r"(^|\.)layers\.\d+\.self_attn\.q_proj$",
    k=r"(^|\.)layers\.\d+\.self_attn\.k_proj$",
    v=r"(^|\.)layers\.\d+\.self_attn\.v_proj$",
    qkv=None,
    out=r"(^|\.)layers\.\d+\.self_attn\.o_proj$",
    causal=True,
    rotary=r"(^|\.)layers\.\d+\.self_attn$",
    geometry=_llama_geometry,
    refuse=_refuse_llama,
)

FAMILIES: tuple[Family, ...] = (BERT, ROBERTA, DISTILBERT, ALBERT, ELECTRA, GPT2, LLAMA)


def supported_model_types() -> list[str]:
    return [t for f in FAMILIES for t in f.model_types]


def family_for(model_type: str | None) -> Family:
    """The family for a config's ``model_type``, or a one-line refusal naming the supported ones."""
    for family in FAMILIES:
        if model_type in family.model_types:
            return family
    supported = ", ".join(f"{f.name} ({'/'.join(f.model_types)})" for f in FAMILIES)
    raise HeadlightError(
        f"unsupported architecture model_type={model_type!r}; supported: {supported}"
    )


def check_supported(family: Family, config: Any) -> None:
    """Refuse, at open time, config features that change attention in ways we do not model."""
    reason = family.refuse(config)
    if reason:
        raise HeadlightError(
            f"{family.name} checkpoint uses {reason}, which Headlight does not model; refusing "
            "rather than showing attention it cannot re-derive"
        )


def layer_scale(family: Family, config: Any, layer: int, geometry: Geometry) -> float:
    scale = float(family.scale(config, layer, geometry))
    if not math.isfinite(scale) or scale <= 0:
        raise HeadlightError(f"attention scale {scale} for layer {layer} is not usable")
    return scale
