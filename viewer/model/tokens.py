"""Tokenising and batching: texts into right-padded batches of token ids, cut to what the model
reads (or to a shorter length the user asks for).

A text longer than the limit is cut and says so: ``Batch.truncated_from`` keeps each text's
original token count, and every recording and report built from the batch carries the note.
"""

from __future__ import annotations

from collections.abc import Iterable, Iterator, Sequence
from dataclasses import dataclass
from typing import Any

import torch

from viewer.errors import HeadlightError
from viewer.model.families import Family, config_value

CHARS_PER_TOKEN = 16
"""A long text is tokenised from a prefix of about this many characters per token it may keep
(cut at a space), grown until its tokens reach past the limit by ``MARGIN``: an 11 MB line then
costs no more than its first part. Sub-word tokens average 3-5 characters of English (common
practice), so one prefix nearly always suffices."""
BATCH_TOKENS = 8192
"""Padded tokens a batch holds at most: a batch's activations and captures grow with B · T, so
texts of thousands of tokens run one at a time, while short texts still share a forward."""
MARGIN = 16
"""Tokens past the limit a prefix must reach, so that cutting the text there (which may split
its last word differently) cannot change the tokens that are kept."""


@dataclass(frozen=True)
class Batch:
    encoding: Any  # transformers BatchEncoding (input_ids, attention_mask, offsets, specials)
    lengths: list[int]  # real tokens per text
    truncated_from: list[int | None]  # a cut text's token count (of a prefix when not counted_all)
    texts: list[str]
    counted_all: list[bool] | None = None  # False where only a long text's prefix was tokenised

    def cut_note(self, i: int) -> str | None:
        """ "text cut from N to M tokens" for a cut text, else None."""
        n = self.truncated_from[i]
        if n is None:
            return None
        exact = self.counted_all is None or self.counted_all[i]
        return f"text cut from {'' if exact else 'more than '}{n} to {self.lengths[i]} tokens"


def model_limit(config: Any, tokenizer: Any, family: Family) -> int:
    """The most tokens the model reads: its position table (less RoBERTa-style offsets), or the
    tokenizer's own limit when that is smaller."""
    positions = config_value(config, "max_position_embeddings", "n_positions", default=512)
    # RoBERTa-style position ids start after the padding index (padding_idx + 1)
    positions -= family.position_offset
    limit = getattr(tokenizer, "model_max_length", None)
    if isinstance(limit, int) and 0 < limit < positions:
        positions = limit
    return int(positions)


class TextEncoder:
    """A checkpoint's tokenizer with the batching rules the model needs."""

    def __init__(self, tokenizer: Any, config: Any, family: Family, head_kind: str):
        self.tokenizer = tokenizer
        self.model_limit = model_limit(config, tokenizer, family)
        self.max_tokens = self.model_limit  # what texts are cut to (``limit`` may lower it)
        # Causal classifiers find their summary token via the pad id; with none defined they
        # can only run one text at a time.
        self.max_batch = 64
        if tokenizer.pad_token is None:
            fallback = tokenizer.eos_token or tokenizer.unk_token
            if fallback is None:
                self.max_batch = 1
            else:
                tokenizer.pad_token = fallback
            if head_kind == "classifier" and getattr(config, "pad_token_id", None) is None:
                self.max_batch = 1
        if (
            family.causal
            and head_kind == "classifier"
            and tokenizer.pad_token_id != getattr(config, "pad_token_id", None)
        ):
            # the classifier reads the last token that is not its pad id: pad with nothing else
            self.max_batch = 1

    def limit(self, max_tokens: int | None) -> None:
        """Cut texts to ``max_tokens`` (at most what the model reads); None restores that."""
        if max_tokens is None:
            self.max_tokens = self.model_limit
            return
        if max_tokens < 2:
            raise HeadlightError(f"--max-tokens must be at least 2, got {max_tokens}")
        self.max_tokens = min(int(max_tokens), self.model_limit)

    def _prefix(self, text: str) -> tuple[str, int, bool]:
        """(the part of ``text`` to tokenise, its token count, whether that is all of it)."""
        reach = (self.max_tokens + MARGIN) * CHARS_PER_TOKEN
        while True:
            if len(text) <= reach:
                return text, len(self.tokenizer(text)["input_ids"]), True
            cut = text.rfind(" ", reach // 2, reach)
            part = text[: cut if cut > 0 else reach]
            count = len(self.tokenizer(part)["input_ids"])
            if count >= self.max_tokens + MARGIN:
                return part, count, False
            reach *= 4

    def encode(self, texts: Sequence[str]) -> Batch:
        """Right-padded ids of ``texts`` cut to ``max_tokens``, with offsets and special flags."""
        texts = [str(t) for t in texts]
        prefixes = [self._prefix(t) for t in texts]
        enc = self.tokenizer(
            [part for part, _, _ in prefixes],
            padding=True,
            truncation=True,
            max_length=self.max_tokens,
            return_offsets_mapping=True,
            return_special_tokens_mask=True,
            return_tensors="pt",
        )
        lengths = [int(n) for n in enc["attention_mask"].sum(dim=1)]
        cut = [count if count > n else None for (_, count, _), n in zip(prefixes, lengths, strict=True)]
        return Batch(enc, lengths, cut, texts, [whole for _, _, whole in prefixes])

    def batches(self, texts: Sequence[str], batch_size: int, tokens: int = BATCH_TOKENS) -> Iterator[Batch]:
        """``texts`` in padded batches of at most ``batch_size`` (and ``max_batch``) texts and
        at most ``tokens`` padded tokens (``BATCH_TOKENS``), in order; a long text runs alone."""
        size = max(1, min(batch_size, self.max_batch))
        for start in range(0, len(texts), size):
            batch = self.encode(texts[start : start + size])
            width = max(batch.lengths, default=0)
            if len(batch.lengths) > 1 and len(batch.lengths) * width > tokens:
                step = max(1, tokens // max(1, width))
                chunk = texts[start : start + size]
                for sub in range(0, len(chunk), step):
                    yield self.encode(chunk[sub : sub + step])
            else:
                yield batch

    def count_cut(self, texts: Iterable[str], chunk: int = 256) -> tuple[int, int]:
        """(texts cut to ``max_tokens``, texts) over ``texts``, tokenised in chunks."""
        cut = total = 0
        part: list[str] = []
        for text in [*texts, None]:
            if text is not None:
                part.append(str(text))
            if part and (text is None or len(part) >= chunk):
                cut += sum(count > self.max_tokens for _, count, _ in (self._prefix(t) for t in part))
                total += len(part)
                part = []
        return cut, total

    def cut_note(self, cut: int, total: int) -> str | None:
        """ "3 of 120 texts were cut to 512 tokens (...)", or None when none was."""
        if not cut:
            return None
        why = "what the model reads" if self.max_tokens == self.model_limit else "--max-tokens"
        return f"{cut} of {total} texts were cut to {self.max_tokens:,} tokens ({why})"

    def from_ids(self, id_lists: Sequence[Sequence[int]]) -> Batch:
        """A right-padded batch from token-id lists (e.g. texts with tokens knocked out)."""
        width = max(len(ids) for ids in id_lists)
        pad = self.tokenizer.pad_token_id
        ids = torch.full((len(id_lists), width), pad if pad is not None else 0, dtype=torch.long)
        mask = torch.zeros((len(id_lists), width), dtype=torch.long)
        for i, row in enumerate(id_lists):
            ids[i, : len(row)] = torch.as_tensor(list(row), dtype=torch.long)
            mask[i, : len(row)] = 1
        lengths = [len(r) for r in id_lists]
        return Batch(
            {"input_ids": ids, "attention_mask": mask}, lengths, [None] * len(lengths), [""] * len(lengths)
        )

    def tokens(self, ids: Sequence[int]) -> tuple[str, ...]:
        return tuple(self.tokenizer.convert_ids_to_tokens(list(ids)))
