"""WordPiece tokenizer for the demo classifier, trained on the generated co-op corpus.

The pipeline is the usual BERT one: the BERT normalizer (lower-casing, accent stripping,
Chinese-character spacing, control-character cleaning), the BERT pre-tokenizer (split on
whitespace and punctuation, so ``[via portal]`` becomes ``[`` ``via`` ``portal`` ``]``),
WordPiece with ``##`` continuation pieces, and a template that wraps one text as
``[CLS] ... [SEP]`` (a pair as ``[CLS] A [SEP] B [SEP]``).

It is saved through ``transformers.PreTrainedTokenizerFast`` so that
``AutoTokenizer.from_pretrained(folder, local_files_only=True)`` returns a fast tokenizer with
character offsets.
"""

from __future__ import annotations

from collections.abc import Iterable
from pathlib import Path

from tokenizers import Tokenizer, decoders, models, normalizers, pre_tokenizers, processors, trainers

SPECIAL_TOKENS: tuple[str, ...] = ("[PAD]", "[UNK]", "[CLS]", "[SEP]", "[MASK]")
MAX_VOCAB: int = 4000


def _alphabet(tok: Tokenizer, texts: list[str]) -> list[str]:
    """Sorted characters of the normalized, pre-tokenized corpus."""
    chars: set[str] = set()
    for text in texts:
        normalized = tok.normalizer.normalize_str(text)
        for piece, _ in tok.pre_tokenizer.pre_tokenize_str(normalized):
            chars.update(piece)
    return sorted(chars)


def _pipeline(model: models.Model) -> Tokenizer:
    tok = Tokenizer(model)
    tok.normalizer = normalizers.BertNormalizer(
        clean_text=True, handle_chinese_chars=True, strip_accents=None, lowercase=True
    )
    tok.pre_tokenizer = pre_tokenizers.BertPreTokenizer()
    return tok


def train_wordpiece(texts: Iterable[str], vocab_size: int = MAX_VOCAB, min_frequency: int = 2) -> Tokenizer:
    """Train a BERT-style WordPiece tokenizer on ``texts``, deterministically.

    Special tokens get ids 0-4 in the order of :data:`SPECIAL_TOKENS` (``[PAD]`` is 0).

    The ``tokenizers`` WordPiece trainer creates the ``##``-continuation tokens of single
    characters in hash-map order, and their ids break ties between equally frequent merges, so
    two runs on the same corpus can give different vocabularies (huggingface/tokenizers issue
    1794). We therefore hand the trainer every ``##c`` of the corpus alphabet up front, in
    sorted order, which fixes those ids; the trained vocabulary is then put into a fresh
    WordPiece model so that only the five real special tokens are marked special.
    """
    texts = list(texts)
    if vocab_size > MAX_VOCAB:
        raise ValueError(f"vocab_size {vocab_size} is above the demo limit {MAX_VOCAB}")
    scratch = _pipeline(models.WordPiece(unk_token="[UNK]", max_input_chars_per_word=100))
    pinned = [f"##{c}" for c in _alphabet(scratch, texts)]
    trainer = trainers.WordPieceTrainer(
        vocab_size=vocab_size,
        min_frequency=min_frequency,
        special_tokens=list(SPECIAL_TOKENS) + pinned,
        continuing_subword_prefix="##",
        show_progress=False,
    )
    scratch.train_from_iterator(texts, trainer=trainer)

    tok = _pipeline(
        models.WordPiece(
            vocab=scratch.get_vocab(),
            unk_token="[UNK]",
            continuing_subword_prefix="##",
            max_input_chars_per_word=100,
        )
    )
    tok.add_special_tokens(list(SPECIAL_TOKENS))
    cls_id = tok.token_to_id("[CLS]")
    sep_id = tok.token_to_id("[SEP]")
    tok.post_processor = processors.TemplateProcessing(
        single="[CLS] $A [SEP]",
        pair="[CLS] $A [SEP] $B:1 [SEP]:1",
        special_tokens=[("[CLS]", cls_id), ("[SEP]", sep_id)],
    )
    tok.decoder = decoders.WordPiece(prefix="##")
    return tok


def save_for_transformers(tok: Tokenizer, folder: Path, model_max_length: int) -> list[Path]:
    """Save ``tok`` as ``tokenizer.json`` + ``tokenizer_config.json`` (+ special tokens map).

    Returns the files written. The folder must exist or is created.
    """
    from transformers import PreTrainedTokenizerFast

    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    fast = PreTrainedTokenizerFast(
        tokenizer_object=tok,
        unk_token="[UNK]",
        pad_token="[PAD]",
        cls_token="[CLS]",
        sep_token="[SEP]",
        mask_token="[MASK]",
        model_max_length=model_max_length,
        padding_side="right",
        truncation_side="right",
    )
    written = fast.save_pretrained(str(folder))
    return [Path(p) for p in written]
