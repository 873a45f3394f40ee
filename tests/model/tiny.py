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
    DistilBertConfig,
    DistilBertForMaskedLM,
    ElectraConfig,
    ElectraForSequenceClassification,
    GPT2Config,
    GPT2LMHeadModel,
    LlamaConfig,
    LlamaForCausalLM,
    PreTrainedTokenizerFast,
    RobertaConfig,
    RobertaForSequenceClassification,
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
            tokenizer_object=tok, unk_token="[UNK]", pad_token="[PAD]", cls_token="[CLS]",
            sep_token="[SEP]", mask_token="[MASK]",
        )
    tok.post_processor = None  # a decoder's text is not wrapped in [CLS] ... [SEP]
    return PreTrainedTokenizerFast(tokenizer_object=tok, unk_token="[UNK]", pad_token="[PAD]",
                                   eos_token="[SEP]", bos_token="[CLS]")


SMALL = dict(hidden_size=32, num_attention_heads=4, num_hidden_layers=2, intermediate_size=48,
             max_position_embeddings=64, vocab_size=200)
LABELS = {"id2label": {0: "repair", 1: "billing", 2: "membership"},
          "label2id": {"repair": 0, "billing": 1, "membership": 2}}


def build(kind: str, **overrides):
    """(model, is_encoder) for one family name; overrides go into the config."""
    if kind == "bert":
        return BertForSequenceClassification(BertConfig(**SMALL, **LABELS, **overrides)), True
    if kind == "bert-bare":
        return BertModel(BertConfig(**SMALL, **overrides)), True
    if kind == "roberta":
        cfg = RobertaConfig(**{**SMALL, "max_position_embeddings": 66}, pad_token_id=0, **LABELS,
                            **overrides)
        return RobertaForSequenceClassification(cfg), True
    if kind == "distilbert":
        cfg = DistilBertConfig(dim=32, n_heads=4, n_layers=2, hidden_dim=48, vocab_size=200,
                               max_position_embeddings=64, **overrides)
        return DistilBertForMaskedLM(cfg), True
    if kind == "albert":
        cfg = AlbertConfig(**{**SMALL, "num_hidden_layers": 3}, embedding_size=16,
                           num_hidden_groups=1, inner_group_num=1, **LABELS, **overrides)
        return AlbertForSequenceClassification(cfg), True
    if kind == "electra":
        cfg = ElectraConfig(**SMALL, embedding_size=16, **LABELS, **overrides)
        return ElectraForSequenceClassification(cfg), True
    if kind == "gpt2":
        cfg = GPT2Config(n_embd=32, n_head=4, n_layer=2, n_positions=64, vocab_size=200,
                         **overrides)
        return GPT2LMHeadModel(cfg), False
    if kind == "llama":
        cfg = LlamaConfig(hidden_size=32, num_attention_heads=4, num_key_value_heads=2,
                          num_hidden_layers=2, intermediate_size=48, vocab_size=200,
                          max_position_embeddings=64, pad_token_id=0, **overrides)
        return LlamaForCausalLM(cfg), False
    raise ValueError(kind)


FAMILY_KINDS = ["bert", "roberta", "distilbert", "albert", "electra", "gpt2", "llama"]


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
