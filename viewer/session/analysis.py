"""What the window shows about one text, computed on the worker thread (numpy only, no Qt).

A run arrives in two steps, so the pair grid can be painted as soon as the model has run:

1. ``analyse`` turns a recording into a ``TextAnalysis`` (cheap); a head's grid, a layer's head
   mean and the text's word units for link scores are computed when first asked for;
2. ``summarise`` adds the re-derivation check and the per-head metrics of
   ``viewer.core.headstats`` for this one text (the costly part for long texts), and for a long
   text every head's overview, all in one pass over each layer's probabilities, as a new
   ``TextAnalysis`` with the *same* recording, so panes that depend only on the recording keep
   what they drew.

A text of up to ``DENSE_TOKENS`` tokens is drawn cell by cell (``grid``); a longer one as an
overview of pooled blocks (``overview``, ``viewer.core.overview``), with exact cells computed for
the part a zoomed view shows (``cells``). Nothing here holds every head's T × T at once.

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
from viewer.core.overview import DENSE_TOKENS, Overview, OverviewBuilder, head_overview
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

    @property
    def dense(self) -> bool:
        """Whether the text is drawn cell by cell (else as an overview)."""
        return self.recording.n_tokens <= DENSE_TOKENS

    def head_mean(self, layer: int) -> np.ndarray:
        """(T, T) float32 head-mean attention of one layer (accumulated in float64)."""
        key = ("mean", layer)
        mean = self._cache.get(key)
        if mean is None:
            mean = self._cache[key] = self.cells(layer, None, slice(0, self.recording.n_tokens))
        return mean

    def cells(self, layer: int, head: int | None, rows: slice, cols: slice | None = None) -> np.ndarray:
        """(rows, cols) float32 exact attention of one head, or the head mean, for a part of
        the grid (a zoomed view of a long text); computed by blocks of rows."""
        scores = self.recording.layer(layer)
        cols = cols or slice(0, self.recording.n_tokens)
        out = np.empty((rows.stop - rows.start, cols.stop - cols.start), dtype=np.float32)
        heads = None if head is None else slice(head, head + 1)
        for part in scores.row_blocks(rows, heads=scores.n_heads if head is None else 1):
            block = scores.rows(part, heads)  # (h, b, T) float64
            out[part.start - rows.start : part.stop - rows.start] = block[:, :, cols].mean(axis=0)
        return out

    def overview(self, layer: int, head: int | None) -> Overview:
        """The pooled overview of one head (or the head mean, ``head`` None): from the summary
        pass when it has run, else computed now (one head, or the layer's head mean)."""
        overviews = self._cache.get("overviews")
        if overviews is not None:
            return overviews[layer][head]
        key = ("overview", layer, head)
        view = self._cache.get(key)
        if view is None:
            scores = self.recording.layer(layer)
            view = self._cache[key] = (
                head_overview(scores, head) if head is not None else mean_overview(scores)
            )
        return view

    def query_rows(self, i: int) -> np.ndarray:
        """(L, H, T) float64 every layer's and head's attention from query row i (cached)."""
        key = ("rows", i)
        rows = self._cache.get(key)
        if rows is None:
            rows = self._cache[key] = self.recording.query_rows(i)
        return rows

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
        """(T, T) attention of one head, or the layer's head mean when ``head`` is None (texts
        of up to ``DENSE_TOKENS`` tokens; longer ones are read by ``overview`` and ``cells``)."""
        if head is None:
            return self.head_mean(layer)
        key = ("grid", layer, head)
        grid = self._cache.get(key)
        if grid is None:
            grid = self._cache[key] = self.cells(layer, head, slice(0, self.recording.n_tokens))
        return grid


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
    stats = HeadStats(rec.n_layers, rec.n_heads)
    long_text = not analysis.dense
    builders: dict[int, tuple[OverviewBuilder, OverviewBuilder]] = {}

    def consumers(layer: int) -> dict:
        special = rec.special
        more = {"heads": [lambda block, layer=layer: stats.add_block(layer, block, special)]}
        if long_text:
            heads = OverviewBuilder(rec.n_heads, rec.n_tokens)
            mean = OverviewBuilder(1, rec.n_tokens)
            builders[layer] = (heads, mean)
            more["heads"].append(heads.add)
            more["mean"] = [mean.add]
        return more

    check = check_recording(rec, threads=threads, consumers=consumers)
    stats.count_text()
    if long_text:
        overviews = {}
        for layer, (heads, mean) in builders.items():
            done = heads.done()
            views = {
                h: Overview(done.size, done.n_tokens, done.maximum[h : h + 1], done.mean[h : h + 1])
                for h in range(rec.n_heads)
            }
            views[None] = mean.done()
            overviews[layer] = views
        analysis._cache["overviews"] = overviews
    return replace(analysis, check=check, heads=stats.summary())


def mean_overview(scores) -> Overview:
    """The overview of a layer's head mean, block by block of rows (``viewer.core.overview``)."""
    builder = OverviewBuilder(1, scores.n_tokens)
    from viewer.core.attention import layer_pass

    layer_pass(scores, mean_consumers=[builder.add])
    return builder.done()


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
    return link_scores(analysis.query_rows(int(tokens.source[0])), tokens)[0]


def unit_links(analysis: TextAnalysis, layer: int, head: int | None, source: int) -> np.ndarray:
    """(K units,) link score from the source's word to every unit, in one head or the mean."""
    u = analysis.units
    s = u.first_token(source)
    scores = analysis.recording.layer(layer)
    row = scores.row(s)  # (H, T) float64 attention from the source
    row = row.mean(axis=0) if head is None else row[head]
    return np.array([row[idx].sum() for idx in u.tokens])
