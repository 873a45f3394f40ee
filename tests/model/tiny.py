"""Tiny random-initialised checkpoints of every supported family, built inside the tests.

Each is built from its transformers config class, saved with ``save_pretrained`` (safetensors)
next to a small WordPiece tokenizer trained here with the ``tokenizers`` library, so the loader
sees exactly what it would see in a user's folder. Nothing is downloaded.
"""

from __future__ import annotations

from pathlib import Path

import torch
from transformers import (
    AlbertConfig,
    AlbertForSequenceClassification,
    BertConfig,
    BertForSequenceClassification,
    BertModel,
    CamembertConfig,
    CamembertForMaskedLM,
    DebertaV2Config,
    DebertaV2ForSequenceClassification,
    DistilBertConfig,
    DistilBertForMaskedLM,
    ElectraConfig,
    ElectraForSequenceClassification,
    Gemma2Config,
    Gemma2ForCausalLM,
    Gemma3ForCausalLM,
    Gemma3TextConfig,
    GemmaConfig,
    GemmaForCausalLM,
    GPT2Config,
    GPT2ForSequenceClassification,
    GPT2LMHeadModel,
    GPTNeoXConfig,
    GPTNeoXForCausalLM,
    LlamaConfig,
    LlamaForCausalLM,
    LlamaForSequenceClassification,
    MistralConfig,
    MistralForCausalLM,
    ModernBertConfig,
    ModernBertForSequenceClassification,
    MPNetConfig,
    MPNetForSequenceClassification,
    OPTConfig,
    OPTForCausalLM,
    Phi3Config,
    Phi3ForCausalLM,
    PreTrainedTokenizerFast,
    Qwen2Config,
    Qwen2ForCausalLM,
    Qwen3Config,
    Qwen3ForSequenceClassification,
    RobertaConfig,
    RobertaForSequenceClassification,
    XLMRobertaConfig,
    XLMRobertaForSequenceClassification,
)

from scripts.demo.tokenizer import train_wordpiece

CORPUS = [
    "the mechanic trued the wheel and she replaced the chain",
    "a member asked about the invoice for the new brake pads",
    "the courier left the frame at the workshop on tuesday",
    "membership renewal is due next month for the tandem club",
    "he fixed the puncture but the tyre was still flat",
    "billing question about the overcharge on my repair",
    "[via portal] please call me back about the gears",
]

TEXTS = [
    "the mechanic trued the wheel",
    "a member asked about the invoice for the new brake pads and the chain",
    "she fixed it",
]

SPECIALS = ["[PAD]", "[UNK]", "[CLS]", "[SEP]", "[MASK]"]


def tokenizer(encoder: bool) -> PreTrainedTokenizerFast:
    # the demo's trainer: the ``tokenizers`` WordPiece trainer alone is not deterministic, and
    # tests here compare token counts and positions across processes
    tok = train_wordpiece(CORPUS, vocab_size=200, min_frequency=0)
    if encoder:
        return PreTrainedTokenizerFast(
            tokenizer_object=tok,
            unk_token="[UNK]",
            pad_token="[PAD]",
            cls_token="[CLS]",
            sep_token="[SEP]",
            mask_token="[MASK]",
        )
    tok.post_processor = None  # a decoder's text is not wrapped in [CLS] ... [SEP]
    return PreTrainedTokenizerFast(
        tokenizer_object=tok, unk_token="[UNK]", pad_token="[PAD]", eos_token="[SEP]", bos_token="[CLS]"
    )


SMALL = dict(
    hidden_size=32,
    num_attention_heads=4,
    num_hidden_layers=2,
    intermediate_size=48,
    max_position_embeddings=64,
    vocab_size=200,
)
LABELS = {
    "id2label": {0: "repair", 1: "billing", 2: "membership"},
    "label2id": {"repair": 0, "billing": 1, "membership": 2},
}


WINDOW = 4  # sliding/local windows of the tiny models: TEXTS[1] (15+ tokens) crosses them all
DECODER = dict(
    hidden_size=32,
    num_attention_heads=4,
    num_key_value_heads=2,
    num_hidden_layers=2,
    intermediate_size=48,
    vocab_size=200,
    max_position_embeddings=64,
    pad_token_id=0,
    bos_token_id=2,
    eos_token_id=3,
)
DEBERTA = dict(
    relative_attention=True,
    pos_att_type=["p2c", "c2p"],
    position_buckets=4,
    max_relative_positions=64,
    share_att_key=True,
    norm_rel_ebd="layer_norm",
    position_biased_input=False,
    type_vocab_size=0,
)


def build(kind: str, **overrides):
    """(model, is_encoder) for one family name; overrides go into the config."""
    if kind == "bert":
        return BertForSequenceClassification(BertConfig(**{**SMALL, **LABELS, **overrides})), True
    if kind == "bert-bare":
        return BertModel(BertConfig(**SMALL, **overrides)), True
    if kind in ("roberta", "xlm-roberta", "camembert"):
        config_cls, model_cls = {
            "roberta": (RobertaConfig, RobertaForSequenceClassification),
            "xlm-roberta": (XLMRobertaConfig, XLMRobertaForSequenceClassification),
            "camembert": (CamembertConfig, CamembertForMaskedLM),
        }[kind]
        cfg = config_cls(**{**SMALL, "max_position_embeddings": 66}, pad_token_id=0, **LABELS, **overrides)
        return model_cls(cfg), True
    if kind == "distilbert":
        cfg = DistilBertConfig(
            dim=32,
            n_heads=4,
            n_layers=2,
            hidden_dim=48,
            vocab_size=200,
            max_position_embeddings=64,
            **overrides,
        )
        return DistilBertForMaskedLM(cfg), True
    if kind == "albert":
        cfg = AlbertConfig(
            **{**SMALL, "num_hidden_layers": 3},
            embedding_size=16,
            num_hidden_groups=1,
            inner_group_num=1,
            **LABELS,
            **overrides,
        )
        return AlbertForSequenceClassification(cfg), True
    if kind == "electra":
        cfg = ElectraConfig(**SMALL, embedding_size=16, **LABELS, **overrides)
        return ElectraForSequenceClassification(cfg), True
    if kind == "deberta-v2":  # v3 layout: shared position projections, log buckets
        cfg = DebertaV2Config(**LABELS, pad_token_id=0, **{**SMALL, **DEBERTA, **overrides})
        return DebertaV2ForSequenceClassification(cfg), True
    if kind == "modernbert":  # layers 0, 2 global; layer 1 local (|i - j| <= WINDOW)
        cfg = ModernBertConfig(
            **{**SMALL, "num_hidden_layers": 3, "local_attention": 2 * WINDOW, **overrides},
            global_attn_every_n_layers=2,
            global_rope_theta=160000.0,
            local_rope_theta=10000.0,
            pad_token_id=0,
            cls_token_id=2,
            sep_token_id=3,
            bos_token_id=2,
            eos_token_id=3,
            **LABELS,
        )
        return ModernBertForSequenceClassification(cfg), True
    if kind == "mpnet":
        cfg = MPNetConfig(**{**SMALL, "max_position_embeddings": 66}, pad_token_id=0, **LABELS, **overrides)
        return MPNetForSequenceClassification(cfg), True
    if kind in ("gpt2", "gpt2-cls"):
        cfg = GPT2Config(
            n_embd=32,
            n_head=4,
            n_layer=2,
            n_positions=64,
            vocab_size=200,
            **({"pad_token_id": 0, **LABELS} if kind == "gpt2-cls" else {}),
            **overrides,
        )
        return (GPT2ForSequenceClassification if kind == "gpt2-cls" else GPT2LMHeadModel)(cfg), False
    if kind == "llama":
        cfg = LlamaConfig(**DECODER, **overrides)
        return LlamaForCausalLM(cfg), False
    if kind == "llama-cls":  # a decoder classifier: the summary token is the last real token
        cfg = LlamaConfig(**DECODER, **LABELS, **overrides)
        return LlamaForSequenceClassification(cfg), False
    if kind == "qwen2":  # q/k/v biases; layer 1 slides (max_window_layers = 1)
        cfg = Qwen2Config(
            **DECODER, use_sliding_window=True, sliding_window=WINDOW, max_window_layers=1, **overrides
        )
        return Qwen2ForCausalLM(cfg), False
    if kind == "qwen3":  # q/k RMS norms, a classifier head, layer 1 slides
        cfg = Qwen3Config(
            **{**DECODER, "head_dim": 8, "sliding_window": WINDOW, **overrides},
            use_sliding_window=True,
            max_window_layers=1,
            **LABELS,
        )
        return Qwen3ForSequenceClassification(cfg), False
    if kind == "mistral":
        cfg = MistralConfig(**DECODER, sliding_window=WINDOW, **overrides)
        return MistralForCausalLM(cfg), False
    if kind == "gemma":
        cfg = GemmaConfig(**DECODER, head_dim=8, **overrides)
        return GemmaForCausalLM(cfg), False
    if kind == "gemma2":  # a small cap so soft-capping changes the scores of a random model
        cfg = Gemma2Config(
            **DECODER,
            **{
                "head_dim": 8,
                "query_pre_attn_scalar": 16,
                "attn_logit_softcapping": 0.5,
                "sliding_window": WINDOW,
                **overrides,
            },
        )
        return Gemma2ForCausalLM(cfg), False
    # layer 0 local (base 10^4), layer 1 global (base 10^6), q/k norms; transformers' Gemma 3
    # attention ignores attn_logit_softcapping, so the recording must not add a cap either
    if kind == "gemma3":
        cfg = Gemma3TextConfig(
            **DECODER,
            head_dim=8,
            query_pre_attn_scalar=16,
            sliding_window=WINDOW,
            sliding_window_pattern=2,
            attn_logit_softcapping=1.0,
            **overrides,
        )
        return Gemma3ForCausalLM(cfg), False
    if kind == "phi3":  # fused qkv_proj with grouped K/V, half the head rotated
        cfg = Phi3Config(**DECODER, partial_rotary_factor=0.5, sliding_window=WINDOW, **overrides)
        return Phi3ForCausalLM(cfg), False
    if kind == "gpt-neox":  # per-head interleaved query_key_value, a quarter rotated
        cfg = GPTNeoXConfig(
            hidden_size=32,
            num_attention_heads=4,
            num_hidden_layers=2,
            intermediate_size=48,
            vocab_size=200,
            max_position_embeddings=64,
            rotary_pct=0.25,
            pad_token_id=0,
            bos_token_id=2,
            eos_token_id=3,
            **overrides,
        )
        return GPTNeoXForCausalLM(cfg), False
    if kind == "opt":
        cfg = OPTConfig(
            hidden_size=32,
            num_attention_heads=4,
            num_hidden_layers=2,
            ffn_dim=48,
            vocab_size=200,
            max_position_embeddings=64,
            word_embed_proj_dim=32,
            pad_token_id=0,
            bos_token_id=2,
            eos_token_id=3,
            **overrides,
        )
        return OPTForCausalLM(cfg), False
    raise ValueError(kind)


FAMILY_KINDS = [
    "bert",
    "roberta",
    "xlm-roberta",
    "camembert",
    "distilbert",
    "albert",
    "electra",
    "deberta-v2",
    "modernbert",
    "mpnet",
    "gpt2",
    "gpt2-cls",
    "llama",
    "llama-cls",
    "qwen2",
    "qwen3",
    "mistral",
    "gemma",
    "gemma2",
    "gemma3",
    "phi3",
    "gpt-neox",
    "opt",
]
CAUSAL_KINDS = {
    "gpt2",
    "gpt2-cls",
    "llama",
    "llama-cls",
    "qwen2",
    "qwen3",
    "mistral",
    "gemma",
    "gemma2",
    "gemma3",
    "phi3",
    "gpt-neox",
    "opt",
}
GROUPED_KINDS = {"llama", "llama-cls", "qwen2", "qwen3", "mistral", "gemma", "gemma2", "gemma3", "phi3"}


def save(folder: Path, kind: str, *, safe: bool = True, seed: int = 0, **overrides) -> Path:
    torch.manual_seed(seed)
    model, encoder = build(kind, **overrides)
    model.eval()
    folder.mkdir(parents=True, exist_ok=True)
    model.save_pretrained(folder)
    if not safe:  # the same weights as a pickle file only
        torch.save(model.state_dict(), folder / "pytorch_model.bin")
        (folder / "model.safetensors").unlink()
    tokenizer(encoder).save_pretrained(folder)
    return folder
