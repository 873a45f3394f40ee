"""What the window shows about one text, computed on the worker thread (numpy only, no Qt).

A run arrives in two steps, so the pair grid can be painted as soon as the model has run:

1. ``analyse`` turns a recording into a ``TextAnalysis`` holding each layer's head mean and the
   text's word units for link scores (cheap);
2. ``summarise`` adds the re-derivation check and the per-head metrics of
   ``viewer.core.headstats`` for this one text (the costly part for long texts), as a new
   ``TextAnalysis`` with the *same* recording, so panes that depend only on the recording keep
   what they drew.

Everything the GUI thread later needs per selection is stored here or a cheap slice of it, so a
selection change never does heavy work on the GUI thread.
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace

import numpy as np

from viewer.core.attention import CheckResult, check_recording
from viewer.core.headstats import METRICS as STAT_METRICS
from viewer.core.headstats import HeadStats, HeadSummary
from viewer.core.links import PairTokens, link_scores, text_words, word_token_indices
from viewer.core.recording import Recording


@dataclass(frozen=True, eq=False)
class WordUnits:
    """The candidates a link can point to: each word's sub-tokens, or a lone token.

    Words are those of a link-pairs file (``viewer.core.links.text_words``: whitespace words,
    end punctuation stripped, located as ``find_word`` locates a pair's word); a word's
    sub-tokens are the tokens whose character span overlaps it
    (``viewer.core.links.word_token_indices``). Tokens in no word (specials, bare punctuation)
    are units of their own.
    """

    names: tuple[str, ...]  # display name per unit
    tokens: tuple[np.ndarray, ...]  # sorted token indices per unit
    of_token: np.ndarray  # (T,) unit index of each token

    def unit_of(self, token: int) -> int:
        return int(self.of_token[token])

    def first_token(self, token: int) -> int:
        """The first sub-token of the word that ``token`` belongs to (a link's query row)."""
        return int(self.tokens[self.unit_of(token)][0])


def word_units(rec: Recording) -> WordUnits:
    t = rec.n_tokens
    of_token = np.full(t, -1, dtype=np.int64)
    groups: list[tuple[int, np.ndarray, str]] = []
    for span in text_words(rec.text):
        idx = word_token_indices(span, rec.offsets)
        idx = idx[of_token[idx] < 0] if idx.size else idx
        if idx.size:
            of_token[idx] = 0
            groups.append((int(idx[0]), idx, rec.text[span[0] : span[1]]))
    for i in np.flatnonzero(of_token < 0):
        groups.append((int(i), np.array([i], dtype=np.int64), rec.tokens[i]))
    groups.sort(key=lambda g: g[0])
    for unit, (_, idx, _) in enumerate(groups):
        of_token[idx] = unit
    return WordUnits(tuple(g[2] for g in groups), tuple(g[1] for g in groups), of_token)


@dataclass(frozen=True, eq=False)
class TextAnalysis:
    """One recorded text with everything the panes draw from it."""

    recording: Recording
    label: str | None = None  # the gold label when the text came from a labelled set
    seconds: float = 0.0  # time spent recording (model forward)
    origin: str = ""  # "text" or the checkpoint's name, for compare titles
    notes: tuple[str, ...] = field(default_factory=tuple)
    check: CheckResult | None = None  # filled in by ``summarise``
    heads: HeadSummary | None = None  # per-head metrics of this one text, by ``summarise``
    # head means and word units, computed when first asked for (not on the way from the model
    # to the first painted grid); shared by the copies ``summarise`` makes
    _cache: dict = field(default_factory=dict, repr=False, compare=False)

    @property
    def units(self) -> WordUnits:
        """The text's words and the tokens of each (``word_units``)."""
        units = self._cache.get("units")
        if units is None:
            units = self._cache["units"] = word_units(self.recording)
        return units

    def head_mean(self, layer: int) -> np.ndarray:
        """(T, T) float32 head-mean attention of one layer (accumulated in float64)."""
        key = ("mean", layer)
        mean = self._cache.get(key)
        if mean is None:
            probs = self.recording.probs[layer]
            mean = self._cache[key] = probs.mean(axis=0, dtype=np.float64).astype(np.float32)
        return mean

    @property
    def summarised(self) -> bool:
        return self.check is not None and self.heads is not None

    def metric(self, name: str) -> np.ndarray | None:
        """(L, H) per-text head metric from ``viewer.core.headstats`` (None: not one, or not
        summarised yet)."""
        if name not in STAT_METRICS or self.heads is None:
            return None
        return getattr(self.heads, name)

    def grid(self, layer: int, head: int | None) -> np.ndarray:
        """(T, T) attention of one head, or the layer's head mean when ``head`` is None."""
        if head is None:
            return self.head_mean(layer)
        return self.recording.probs[layer, head]


def analyse(
    rec: Recording,
    *,
    label: str | None = None,
    seconds: float = 0.0,
    origin: str = "",
    summarised: bool = False,
) -> TextAnalysis:
    """A recording as the panes' analysis; head means and word units follow when first asked
    for (with ``summarised`` the check and head metrics are added now)."""
    analysis = TextAnalysis(rec, label, seconds, origin, tuple(rec.notes))
    return summarise(analysis) if summarised else analysis


def summarise(analysis: TextAnalysis, threads: int | None = None) -> TextAnalysis:
    """The same analysis (same recording object) with the re-derivation check and head metrics.

    ``threads`` is passed to the check (the window uses 1: the render thread needs the other
    core to draw the new run while this runs)."""
    rec = analysis.recording
    check = check_recording(rec, threads=threads)
    stats = HeadStats(rec.n_layers, rec.n_heads)
    stats.add(rec.probs, rec.special, rec.causal, visible=rec.key_masks())
    return replace(analysis, check=check, heads=stats.summary())


# -- link scores ---------------------------------------------------------------------------------


def pair_tokens_for(analysis: TextAnalysis, source: int, targets: list[int]) -> PairTokens:
    """Core ``PairTokens`` for a source token and candidate tokens, each widened to its word."""
    u = analysis.units
    return PairTokens(
        source=u.tokens[u.unit_of(source)],
        candidates=tuple(u.tokens[u.unit_of(t)] for t in targets),
    )


def per_head_link(analysis: TextAnalysis, source: int, target: int) -> np.ndarray:
    """(L, H) link score from the source's word to the target's word in every head."""
    tokens = pair_tokens_for(analysis, source, [target])
    return link_scores(analysis.recording.probs, tokens)[0]


def unit_links(analysis: TextAnalysis, layer: int, head: int | None, source: int) -> np.ndarray:
    """(K units,) link score from the source's word to every unit, in one head or the mean."""
    u = analysis.units
    s = u.first_token(source)
    row = analysis.grid(layer, head)[s].astype(np.float64)  # (T,) attention from the source
    return np.array([row[idx].sum() for idx in u.tokens])
