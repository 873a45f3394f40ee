"""Architecture families: where each architecture keeps its attention, as declarative records.

A family says which modules produce the queries, keys and values (or one fused projection that
is split), which module is the attention output projection (whose *input* is the concatenation of
the head outputs, where the head gates sit), how the scores are scaled, whether the mask is
causal, whether rotary positions are applied, how many key/value heads there are, and which
score terms beyond q·k the architecture adds (``viewer.core.terms``, defined in
``docs/families.md``). Every term is recorded and re-derived by the check, never skipped.

What is modelled, per family:

- BERT, RoBERTa, XLM-RoBERTa, CamemBERT, ELECTRA, DistilBERT, ALBERT (shared layers): plain
  scaled dot product, 1/√d, padding mask only.
- DeBERTa-v2/v3: disentangled attention, content·content + c2p + p2c over log-bucketed relative
  positions (any subset of c2p/p2c, shared or separate position projections, buckets on or
  off), scale 1/√(d·(1 + number of position terms)).
- ModernBERT: fused Wqkv; rotary with the model's own tables per layer (global and local bases);
  local layers see only keys within ``local_attention / 2`` on either side.
- MPNet: T5-style bucketed relative-position bias added to the scaled scores.
- GPT-2: fused ``c_attn``, causal, 1/√d and the optional 1/(layer + 1).
- Llama (and SmolLM-style Llama), Qwen2/2.5 (q/k/v biases), Mistral (sliding window), Qwen3
  (per-head RMS norm on q and k, captured after the norm; optional sliding layers), Gemma
  (rotary, grouped K/V), Gemma 2 (``query_pre_attn_scalar`` scale, tanh soft-capping,
  alternating sliding/global layers), Gemma 3 (q/k norms, per-layer-type rotary bases, sliding
  layers; its attention applies no soft-cap even when the config names one), Phi-3 (fused
  ``qkv_proj``, partial rotary, sliding window), GPT-NeoX/Pythia (fused per-head interleaved
  ``query_key_value``, partial rotary over ``rotary_pct``), OPT. Rotary
  scaling of every kind comes with the model's own cos/sin tables, which are captured per layer.
- Decoder sequence classifiers of these families read the last real token.

Refused with a one-line error naming the feature: relative-position embeddings of the BERT
family (``position_embedding_type``), cross-attention and encoder-decoder models, ALiBi
position biases, DeBERTa's ``p2p`` term, Gemma's bidirectional variant, and any architecture
not listed here.

Modules are found by regular expressions over ``model.named_modules()`` names, and a layer's
index is the order in which the attention of that layer runs during a forward pass. That order
is the same as the module order for ordinary stacks and it also covers ALBERT, whose one shared
layer runs ``num_hidden_layers`` times.

To add a family: write a ``Family(...)`` record below, add it to ``FAMILIES``, and add the tiny
random model of that architecture to ``tests/model/tiny.py``. See DEVELOPERS.md.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

from viewer.errors import HeadlightError


def config_value(config: Any, *names: str, default: Any = None) -> Any:
    """The first of ``names`` the config sets (architectures name the same size differently)."""
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


Window = tuple[int, int] | None  # keys (before, after) a query sees; -1 = unbounded side


def _no_windows(config: Any, n_layers: int) -> list[Window]:
    return [None] * n_layers


@dataclass(frozen=True)
class Family:
    name: str
    model_types: tuple[str, ...]
    q: str | None  # regex of the query projection modules (None when fused)
    k: str | None
    v: str | None
    qkv: str | None  # regex of a fused q|k|v projection (split by ``qkv_layout``)
    out: str  # regex of the attention output projection (its input carries the head outputs)
    causal: bool
    rotary: str | None = None  # regex of the attention module receiving (cos, sin) position kwargs
    scale: Callable[[Any, int, Geometry], float] = lambda config, layer, g: g.head_dim**-0.5
    geometry: Callable[[Any], Geometry] | None = None
    refuse: Callable[[Any], str | None] = lambda config: None
    shared_layers: bool = False
    # "split": q | k | v along the last axis (H·d, G·d, G·d); "per_head": [q k v] for each head
    qkv_layout: str = "split"
    # captured q/k outputs: "flat" (B, T, n·d), "bthd" (B, T, n, d) or "bhtd" (B, n, T, d)
    qk_layout: str = "flat"
    position_offset: int = 0  # positions taken before the first token (RoBERTa's padding_idx + 1)
    windows: Callable[[Any, int], list[Window]] = _no_windows
    softcap: Callable[[Any], float] = lambda config: 0.0
    # relative-position terms: "disentangled" (DeBERTa c2p/p2c) or "bias" (MPNet), with the
    # module whose inputs carry them and DeBERTa's separate position projections
    relative: str | None = None
    relative_module: str | None = None
    pos_k: str | None = None
    pos_q: str | None = None

    def head_geometry(self, config: Any) -> Geometry:
        if self.geometry is not None:
            return self.geometry(config)
        hidden = config_value(config, "hidden_size", "dim", "n_embd")
        heads = config_value(config, "num_attention_heads", "n_heads", "n_head")
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


def _refuse_bidirectional(config: Any) -> str | None:
    if getattr(config, "use_bidirectional_attention", False):
        return "use_bidirectional_attention (a non-causal variant)"
    return None


def _refuse_deberta(config: Any) -> str | None:
    unknown = sorted(set(deberta_terms(config)) - {"c2p", "p2c"})
    if unknown:
        return f"pos_att_type term(s) {', '.join(unknown)}"
    return None


def _gpt2_scale(config: Any, layer: int, g: Geometry) -> float:
    """GPT-2's rule: 1/sqrt(d) when scale_attn_weights, further 1/(layer+1) when asked."""
    scale = g.head_dim**-0.5 if getattr(config, "scale_attn_weights", True) else 1.0
    if getattr(config, "scale_attn_by_inverse_layer_idx", False):
        scale /= float(layer + 1)
    return scale


def _gemma2_scale(config: Any, layer: int, g: Geometry) -> float:
    """Gemma 2 and 3 scale by query_pre_attn_scalar^(-1/2) instead of d^(-1/2)."""
    return float(config.query_pre_attn_scalar) ** -0.5


def deberta_terms(config: Any) -> list[str]:
    kinds = getattr(config, "pos_att_type", None) or []
    if isinstance(kinds, str):
        kinds = kinds.lower().split("|")
    return [k.strip() for k in kinds if k.strip()]


def _deberta_scale(config: Any, layer: int, g: Geometry) -> float:
    """1/√(d·(1 + number of position terms)) (He et al. 2021, §3.1; counted even without
    relative_attention, as the released implementation does)."""
    n_terms = sum(1 for k in ("c2p", "p2c") if k in deberta_terms(config))
    return (g.head_dim * (1 + n_terms)) ** -0.5


def _llama_geometry(config: Any) -> Geometry:
    heads = config.num_attention_heads
    kv = getattr(config, "num_key_value_heads", None) or heads
    head_dim = getattr(config, "head_dim", None) or config.hidden_size // heads
    if heads % kv:
        raise HeadlightError(f"{heads} attention heads cannot share {kv} key/value heads evenly")
    return Geometry(heads, kv, head_dim)


def _deberta_geometry(config: Any) -> Geometry:
    heads = config.num_attention_heads
    size = getattr(config, "attention_head_size", None) or config.hidden_size // heads
    return Geometry(heads, heads, size)


def _sliding_all(config: Any, n_layers: int) -> list[Window]:
    """Every layer causal with a sliding window of w keys: j > i − w (Mistral, Phi-3)."""
    w = getattr(config, "sliding_window", None)
    return [(int(w) - 1, -1) if w else None] * n_layers


def _sliding_typed(config: Any, n_layers: int) -> list[Window]:
    """The layers typed "sliding_attention" see keys j > i − w (Qwen2/3, Gemma 2/3)."""
    w = getattr(config, "sliding_window", None)
    types = getattr(config, "layer_types", None) or ["full_attention"] * n_layers
    return [(int(w) - 1, -1) if w and t == "sliding_attention" else None for t in types]


def _local_typed(config: Any, n_layers: int) -> list[Window]:
    """ModernBERT's local layers see keys with |i − j| <= local_attention / 2."""
    w = int(config.sliding_window)  # local_attention // 2 in transformers' ModernBertConfig
    return [(w, w) if t == "sliding_attention" else None for t in config.layer_types]


def _gemma2_softcap(config: Any) -> float:
    return float(getattr(config, "attn_logit_softcapping", None) or 0.0)


def _albert_layers(prefix: str) -> str:
    return rf"(^|\.)encoder\.albert_layer_groups\.\d+\.albert_layers\.\d+\.attention\.{prefix}$"


def _bert_like(name: str, model_types: tuple[str, ...], position_offset: int = 0) -> Family:
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
        position_offset=position_offset,
    )


def _decoder(name: str, model_types: tuple[str, ...], **changes: Any) -> Family:
    """A Llama-style decoder layout (layers.N.self_attn.{q,k,v,o}_proj), with changes."""
    attn = r"(^|\.)layers\.\d+\.self_attn"
    fields: dict[str, Any] = dict(
        name=name,
        model_types=model_types,
        q=attn + r"\.q_proj$",
        k=attn + r"\.k_proj$",
        v=attn + r"\.v_proj$",
        qkv=None,
        out=attn + r"\.o_proj$",
        causal=True,
        rotary=attn + "$",
        geometry=_llama_geometry,
    )
    fields.update(changes)
    return Family(**fields)


_ATTN = r"(^|\.)layers\.\d+\.self_attn"

BERT = _bert_like("BERT", ("bert",))
ROBERTA = _bert_like("RoBERTa", ("roberta",), position_offset=2)
XLM_ROBERTA = _bert_like("XLM-RoBERTa", ("xlm-roberta",), position_offset=2)
CAMEMBERT = _bert_like("CamemBERT", ("camembert",), position_offset=2)
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

_DEBERTA = r"(^|\.)encoder\.layer\.\d+\.attention\."
DEBERTA_V2 = Family(
    name="DeBERTa-v2",
    model_types=("deberta-v2",),
    q=_DEBERTA + r"self\.query_proj$",
    k=_DEBERTA + r"self\.key_proj$",
    v=_DEBERTA + r"self\.value_proj$",
    qkv=None,
    out=_DEBERTA + r"output\.dense$",
    causal=False,
    scale=_deberta_scale,
    geometry=_deberta_geometry,
    refuse=_refuse_deberta,
    relative="disentangled",
    relative_module=_DEBERTA + r"self$",
    pos_k=_DEBERTA + r"self\.pos_key_proj$",
    pos_q=_DEBERTA + r"self\.pos_query_proj$",
)

MPNET = Family(
    name="MPNet",
    model_types=("mpnet",),
    q=r"(^|\.)encoder\.layer\.\d+\.attention\.attn\.q$",
    k=r"(^|\.)encoder\.layer\.\d+\.attention\.attn\.k$",
    v=r"(^|\.)encoder\.layer\.\d+\.attention\.attn\.v$",
    qkv=None,
    out=r"(^|\.)encoder\.layer\.\d+\.attention\.attn\.o$",
    causal=False,
    position_offset=2,
    relative="bias",
    relative_module=r"(^|\.)encoder\.relative_attention_bias$",
)

MODERNBERT = Family(
    name="ModernBERT",
    model_types=("modernbert",),
    q=None,
    k=None,
    v=None,
    qkv=r"(^|\.)layers\.\d+\.attn\.Wqkv$",
    out=r"(^|\.)layers\.\d+\.attn\.Wo$",
    causal=False,
    rotary=r"(^|\.)layers\.\d+\.attn$",
    windows=_local_typed,
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

LLAMA = _decoder("Llama", ("llama",))
QWEN2 = _decoder("Qwen2", ("qwen2",), windows=_sliding_typed)
QWEN3 = _decoder(
    "Qwen3",
    ("qwen3",),
    q=_ATTN + r"\.q_norm$",
    k=_ATTN + r"\.k_norm$",
    qk_layout="bthd",
    windows=_sliding_typed,
)
MISTRAL = _decoder("Mistral", ("mistral",), windows=_sliding_all)
GEMMA = _decoder("Gemma", ("gemma",), refuse=_refuse_bidirectional)
GEMMA2 = _decoder(
    "Gemma 2",
    ("gemma2",),
    scale=_gemma2_scale,
    windows=_sliding_typed,
    softcap=_gemma2_softcap,
    refuse=_refuse_bidirectional,
)
GEMMA3 = _decoder(
    "Gemma 3",
    ("gemma3_text",),
    q=_ATTN + r"\.q_norm$",
    k=_ATTN + r"\.k_norm$",
    qk_layout="bhtd",
    scale=_gemma2_scale,
    windows=_sliding_typed,
    refuse=_refuse_bidirectional,
)  # its attention passes no soft-cap (transformers 5)
PHI3 = _decoder("Phi-3", ("phi3",), q=None, k=None, v=None, qkv=_ATTN + r"\.qkv_proj$", windows=_sliding_all)
OPT = _decoder("OPT", ("opt",), out=_ATTN + r"\.out_proj$", rotary=None, geometry=None)
GPT_NEOX = Family(
    name="GPT-NeoX",
    model_types=("gpt_neox",),
    q=None,
    k=None,
    v=None,
    qkv=r"(^|\.)layers\.\d+\.attention\.query_key_value$",
    out=r"(^|\.)layers\.\d+\.attention\.dense$",
    causal=True,
    rotary=r"(^|\.)layers\.\d+\.attention$",
    qkv_layout="per_head",
)

FAMILIES: tuple[Family, ...] = (
    BERT,
    ROBERTA,
    XLM_ROBERTA,
    CAMEMBERT,
    DISTILBERT,
    ALBERT,
    ELECTRA,
    DEBERTA_V2,
    MODERNBERT,
    MPNET,
    GPT2,
    LLAMA,
    QWEN2,
    QWEN3,
    MISTRAL,
    GEMMA,
    GEMMA2,
    GEMMA3,
    PHI3,
    GPT_NEOX,
    OPT,
)

# architectures whose attention has something Headlight does not model, named in the refusal
UNMODELLED = {
    "bloom": "ALiBi position biases",
    "mpt": "ALiBi position biases",
    "falcon": "ALiBi or parallel attention variants",
    "t5": "encoder-decoder cross-attention",
    "mt5": "encoder-decoder cross-attention",
    "bart": "encoder-decoder cross-attention",
    "mbart": "encoder-decoder cross-attention",
    "marian": "encoder-decoder cross-attention",
    "pegasus": "encoder-decoder cross-attention",
    "deberta": "DeBERTa v1 disentangled attention (only DeBERTa-v2/v3 is modelled)",
}


def supported_model_types() -> list[str]:
    return [t for f in FAMILIES for t in f.model_types]


def family_for(model_type: str | None) -> Family:
    """The family for a config's ``model_type``, or a one-line refusal naming the supported ones."""
    for family in FAMILIES:
        if model_type in family.model_types:
            return family
    supported = ", ".join(f"{f.name} ({'/'.join(f.model_types)})" for f in FAMILIES)
    feature = UNMODELLED.get(str(model_type))
    because = f" ({feature}, which Headlight does not model)" if feature else ""
    raise HeadlightError(
        f"unsupported architecture model_type={model_type!r}{because}; supported: {supported}"
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
