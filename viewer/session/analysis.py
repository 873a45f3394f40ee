"""What the window shows about one text, computed on the worker thread (numpy only, no Qt).

A run arrives in two steps, so the pair grid can be painted as soon as the model has run:

1. ``analyse`` turns a recording into a ``TextAnalysis`` (cheap); a head's grid, a layer's head
   mean and the text's word units for link scores are computed when first asked for;
2. ``summarise`` adds the re-derivation check and the per-head metrics of
   ``viewer.core.headstats`` for this one text (the costly part for long texts), and for a long
   text every head's overview, all in one pass over each layer's probabilities, as a new
   ``TextAnalysis`` with the *same* recording, so panes that depend only on the recording keep
   what they drew. Each layer's overviews are stored as soon as that layer's pass is over.

A text of up to ``DENSE_TOKENS`` tokens is drawn cell by cell (``grid``); a longer one as an
overview of pooled blocks (``overview``, ``viewer.core.overview``), with exact cells computed for
the part a zoomed view shows (``cells``, ``visible``) and single rows for a hovered cell
(``row``). Nothing here holds every head's T × T at once.

What a selection change needs on the GUI thread is stored here or a cheap slice of it
(``cached_overview`` never computes); what is not there yet is computed off the GUI thread.
"""

from __future__ import annotations

import re
from collections.abc import Callable
from dataclasses import dataclass, field, replace

import numpy as np

from viewer.core.attention import CheckResult, check_recording
from viewer.core.headstats import METRICS as STAT_METRICS
from viewer.core.headstats import HeadStats, HeadSummary
from viewer.core.links import PairTokens, link_scores, text_words, word_token_indices
from viewer.core.overview import DENSE_TOKENS, Overview, OverviewBuilder, head_overview
from viewer.core.recording import Recording
from viewer.core.terms import visible_rows

_WORD_REST = re.compile(r"\S*")  # the rest of a whitespace word (str.split's whitespace)


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


def recorded_text(rec: Recording) -> str:
    """The part of the recording's text its tokens cover, to the end of the whitespace word the
    last token ends in: the words beyond a cut text have no tokens, and a text of megabytes need
    not be read to the end for the few thousand tokens the model took."""
    ends = rec.offsets[:, 1] if rec.n_tokens else np.zeros(0)
    end = int(ends.max()) if ends.size else 0
    return rec.text[: _WORD_REST.match(rec.text, end).end()]


def overlapping_tokens(offsets: np.ndarray):
    """``word_token_indices(span, offsets)`` for many spans, each by two binary searches.

    The tokens overlapping [s, e) are those with a non-empty span, start < e and end > s. When the
    non-empty spans' starts and ends both grow with the token index (as a tokenizer's offsets of
    one text do), those tokens are a run of consecutive ones, found by binary search; a text of
    8,192 tokens and 3,000 words then takes milliseconds instead of a scan of every token per
    word. Offsets out of order fall back to the scan."""
    off = np.asarray(offsets).reshape(-1, 2)
    start, end = off[:, 0], off[:, 1]
    real = np.flatnonzero(end > start)  # tokens with a span, in order
    starts, ends = start[real], end[real]
    if np.any(np.diff(starts) < 0) or np.any(np.diff(ends) < 0):
        return lambda span: word_token_indices(span, off)

    def find(span) -> np.ndarray:
        s, e = span
        lo = int(np.searchsorted(ends, s, side="right"))  # first with end > s
        hi = int(np.searchsorted(starts, e, side="left"))  # first with start >= e
        return real[lo:hi].astype(np.int64)

    return find


def word_units(rec: Recording) -> WordUnits:
    t = rec.n_tokens
    of_token = np.full(t, -1, dtype=np.int64)
    groups: list[tuple[int, np.ndarray, str]] = []
    text = recorded_text(rec)
    tokens_of = overlapping_tokens(rec.offsets)
    for span in text_words(text):
        idx = tokens_of(span)
        idx = idx[of_token[idx] < 0] if idx.size else idx
        if idx.size:
            of_token[idx] = 0
            groups.append((int(idx[0]), idx, text[span[0] : span[1]]))
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
    # head means, computed when first asked for (not on the way from the model to the first
    # painted grid), and word units (filled by the run job, off the GUI thread); shared by the
    # copies ``summarise`` makes
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

    def cells(
        self,
        layer: int,
        head: int | None,
        rows: slice,
        cols: slice | None = None,
        tick: Callable[[], None] | None = None,
    ) -> np.ndarray:
        """(rows, cols) float32 exact attention of one head, or the head mean, for a part of
        the grid (a zoomed view of a long text); computed by blocks of rows, calling ``tick``
        before each (a caller's cancel check may raise there)."""
        scores = self.recording.layer(layer)
        cols = cols or slice(0, self.recording.n_tokens)
        out = np.empty((rows.stop - rows.start, cols.stop - cols.start), dtype=np.float32)
        heads = None if head is None else slice(head, head + 1)
        for part in scores.row_blocks(rows, heads=scores.n_heads if head is None else 1):
            if tick is not None:
                tick()
            block = scores.rows(part, heads)  # (h, b, T) float64
            out[part.start - rows.start : part.stop - rows.start] = block[:, :, cols].mean(axis=0)
        return out

    def visible(self, layer: int, rows: slice, cols: slice) -> np.ndarray | None:
        """(rows, cols) bool: which of these cells of ``layer`` a query sees (causal rule,
        window; ``viewer.core.terms.visible_rows``), or None when it sees all of them. Only
        the rows asked for are built, never the T × T mask."""
        rec = self.recording
        part = visible_rows(rows, rec.n_tokens, rec.causal, rec.terms.layer_window(layer), cols)
        return None if part is None or part.all() else part

    def row(self, layer: int, head: int | None, i: int) -> np.ndarray:
        """(T,) float64 exact attention from query row i in one head or the head mean (zeros
        where the row sees no key); the last row asked for is kept (a hovered row is asked
        for again at every move along it)."""
        key = (layer, head, i)
        kept = self._cache.get("row")
        if kept is not None and kept[0] == key:
            return kept[1]
        if (
            self.dense
            and self._cache.get(("grid", layer, head) if head is not None else ("mean", layer)) is not None
        ):
            values = np.asarray(self.grid(layer, head)[i], dtype=np.float64)
        else:
            scores = self.recording.layer(layer)
            heads = None if head is None else slice(head, head + 1)
            values = scores.rows(slice(i, i + 1), heads)[:, 0].mean(axis=0)  # (T,)
        self._cache["row"] = (key, values)
        return values

    def cached_overview(self, layer: int, head: int | None) -> Overview | None:
        """The overview of one head (or the head mean) if it is computed already, else None;
        never computes, so the GUI thread may ask."""
        return self._cache.get(("overview", layer, head))

    def overview(self, layer: int, head: int | None, tick: Callable[[], None] | None = None) -> Overview:
        """The pooled overview of one head (or the head mean, ``head`` None): from the summary
        pass when it has reached the layer, else computed now (one head, or the layer's head
        mean; ``tick`` is called before each block of rows)."""
        view = self.cached_overview(layer, head)
        if view is None:
            scores = self.recording.layer(layer)
            view = head_overview(scores, head, tick=tick) if head is not None else mean_overview(scores, tick)
            self._cache[("overview", layer, head)] = view
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

    def consumers(layer: int) -> dict:
        special = rec.special
        more = {"heads": [lambda block, layer=layer: stats.add_block(layer, block, special)]}
        if long_text:
            heads = OverviewBuilder(rec.n_heads, rec.n_tokens)
            mean = OverviewBuilder(1, rec.n_tokens)
            more["heads"].append(heads.add)
            more["mean"] = [mean.add]
            more["done"] = [lambda: publish(layer, heads, mean)]
        return more

    def publish(layer: int, heads: OverviewBuilder, mean: OverviewBuilder) -> None:
        # as soon as the layer is complete: the pane shows any of its heads at once from now
        done = heads.done()
        for h in range(rec.n_heads):
            view = Overview(done.size, done.n_tokens, done.maximum[h : h + 1], done.mean[h : h + 1])
            analysis._cache[("overview", layer, h)] = view
        analysis._cache[("overview", layer, None)] = mean.done()

    check = check_recording(rec, threads=threads, consumers=consumers)
    stats.count_text()
    return replace(analysis, check=check, heads=stats.summary())


def mean_overview(scores, tick: Callable[[], None] | None = None) -> Overview:
    """The overview of a layer's head mean, block by block of rows (``viewer.core.overview``);
    ``tick`` is called before each block."""
    builder = OverviewBuilder(1, scores.n_tokens)
    from viewer.core.attention import layer_pass

    def add(block) -> None:
        if tick is not None:
            tick()
        builder.add(block)

    layer_pass(scores, mean_consumers=[add])
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
