"""Shortcut search by word knockout over a text set (DESIGN.md, "Word knockout").

For every text, every distinct word (and, separately, every two-word phrase) is knocked out
by deleting all of its sub-tokens from the input; the change in the probability of the
originally predicted class is its ``drop``, a change of the predicted class a ``flip``. Over the
text set each word gets ``count``, ``flip_rate``, ``mean_drop`` and ``focus``, and words seen in
at least 3 texts are ranked by the lower end of the Wilson interval of their flip rate.

Cost: one forward per (text, word) plus one per (text, phrase), batched across texts, so the
work grows linearly with the total number of words.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable
from dataclasses import dataclass

import numpy as np

from viewer.core.links import word_token_indices
from viewer.core.shortcuts import (
    KnockoutOutcome,
    KnockoutTally,
    phrase_spans,
    word_spans,
)
from viewer.core.summary import summary_index, summary_share
from viewer.errors import HeadlightError
from viewer.model.attribution import predict_without
from viewer.model.loader import Attention, LoadedModel
from viewer.reports.heads import _require_prediction
from viewer.reports.textsets import TextItem, chunks


@dataclass
class ShortcutReport:
    words: KnockoutTally
    phrases: KnockoutTally
    texts: int
    examples: dict[str, list[int]]  # word -> indices (0-based, in input order) of texts with it

    def to_dict(self, limit: int | None = None) -> dict:
        return {
            "texts": self.texts,
            "tokens": self.words.ranking(limit=limit),
            "phrases": self.phrases.ranking(limit=limit),
        }


def _token_sets(att: Attention, spans: dict[str, list[tuple[int, int]]]) -> dict[str, np.ndarray]:
    """Word key -> sorted sub-token indices of all its occurrences (empty keys dropped)."""
    out = {}
    for key, key_spans in spans.items():
        idx = np.unique(np.concatenate(
            [word_token_indices(s, att.offsets) for s in key_spans] or [np.zeros(0, np.int64)]))
        idx = idx[~att.special[idx]] if idx.size else idx
        if idx.size and idx.size < len(att.token_ids):
            out[key] = idx
    return out


def shortcut_search(loaded: LoadedModel, items: Iterable[TextItem], *, batch_size: int = 32,
                    phrases: bool = True, keep_examples: bool = True,
                    progress: Callable[[int], None] | None = None) -> ShortcutReport:
    """Word (and phrase) knockout over a text set; streams the texts."""
    _require_prediction(loaded, "shortcut search")
    words, pairs = KnockoutTally(), KnockoutTally()
    examples: dict[str, list[int]] = {}
    index = 0
    for chunk in chunks(items, 16):
        atts = list(loaded.attentions([i.text for i in chunk], batch_size=batch_size))
        plans = []  # per text: [(kind, key, token indices)] in the order of `cases`
        cases = []  # (token ids, sub-tokens to delete), one per knockout
        for att in atts:
            plan = [("w", key, idx) for key, idx in _token_sets(att, word_spans(att.text)).items()]
            if phrases:
                plan += [("p", key, idx)
                         for key, idx in _token_sets(att, phrase_spans(att.text)).items()]
            cases.extend((att.token_ids, idx) for _, _, idx in plan)
            plans.append(plan)
        after = predict_without(loaded, cases, batch_size) if cases else None
        row = 0
        for att, plan in zip(atts, plans, strict=True):
            pred = int(np.argmax(att.target))
            p0 = float(att.target[pred])
            s = summary_index(len(att.token_ids), loaded.family.causal)
            outcomes: dict[str, dict[str, KnockoutOutcome]] = {"w": {}, "p": {}}
            for kind, key, idx in plan:
                p = after[row]
                row += 1
                outcomes[kind][key] = KnockoutOutcome(
                    flipped=bool(int(np.argmax(p)) != pred),
                    drop=p0 - float(p[pred]),
                    focus=summary_share(att.probs[-1], s, idx),
                )
                if keep_examples and kind == "w":
                    examples.setdefault(key, []).append(index)
            words.add_text(outcomes["w"])
            if phrases:
                pairs.add_text(outcomes["p"])
            index += 1
        if progress:
            progress(len(chunk))
    if words.texts == 0:
        raise HeadlightError("the text set holds no texts")
    return ShortcutReport(words, pairs, words.texts, examples)
