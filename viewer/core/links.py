"""Link scores: does a head point from a word to the word it refers to?

A **link pair** (docs/definitions.md, "Link pairs") is a text, a source word (e.g. "she"), the target it
refers to ("mechanic") and one or more distractors ("courier"). Rules, as docs/definitions.md
has them:

* each word is matched as its first whole-word, case-insensitive occurrence in the text (a
  character span);
* a word's sub-tokens are the tokens whose character span overlaps the word's span (tokens with
  an empty span, such as specials at (0, 0), belong to no word);
* the link score from the source to a candidate, in one head, is the attention from the
  source's first sub-token (query row) summed over all of the candidate's sub-tokens (key
  columns);
* a head gets a pair right when the target's score is strictly above every distractor's
  (a tie is wrong);
* the *nearest* baseline picks the candidate whose first sub-token is closest to the source's
  first sub-token. When several candidates are equally close the baseline has not picked one,
  and the pair counts as wrong for it (the same rule as a head's tie).

The link-pairs file is ``.jsonl``, UTF-8, one object a line; blank lines are skipped:
``{"text": ..., "source": "she", "target": "mechanic", "distractors": ["courier"]}``.

The window's words (what a clicked token's link score is summed over, ``text_words``) use the
same rule: each whitespace word, its end punctuation stripped, is located with ``find_word``
from where that whitespace word starts, so a pair scored from a file and the same words clicked
in the window cover the same sub-tokens.
"""

from __future__ import annotations

import math
import re
from collections.abc import Iterable, Iterator, Sequence
from dataclasses import dataclass
from os import PathLike
from pathlib import Path
from typing import Any

import numpy as np

from viewer.core.words import split_words
from viewer.errors import HeadlightError
from viewer.safejson import loads as json_loads

Span = tuple[int, int]


# -- words and sub-tokens ------------------------------------------------------------------------


def find_word(text: str, word: str, start: int = 0) -> Span | None:
    """Character span [start, end) of the first whole-word, case-insensitive match at or after
    ``start``, or None.

    Whole word: not preceded or followed by a letter, digit or underscore (regex ``\\w``), so
    "she" is not found inside "shelf", and "co-op" is found in "the co-op's".
    """
    if not word:
        return None
    pattern = re.compile(r"(?<!\w)" + re.escape(word) + r"(?!\w)", flags=re.IGNORECASE)
    match = pattern.search(text, start)
    if match is None:
        return None
    return match.start(), match.end()


def text_words(text: str) -> list[Span]:
    """The words of a text in order, as ``find_word`` would locate each of them.

    Every whitespace word with a non-empty key (``viewer.core.words``: end punctuation
    stripped) is looked up with ``find_word`` from the start of that whitespace word; "the
    co-op's bikes." gives the spans of "the", "co-op's" and "bikes". A key that is not a whole
    word where it stands (glued to an underscore, e.g. "_tag_") keeps its plain position.
    """
    spans = []
    for w in split_words(text):
        if not w.key:
            continue
        span = find_word(text, w.key, w.start)
        if span is None or span[1] > w.end:
            span = (w.key_start, w.key_end)
        spans.append(span)
    return spans


def word_token_indices(span: Span, offsets: np.ndarray) -> np.ndarray:
    """Indices of the tokens whose span overlaps ``span``: offsets (T, 2) -> (n,) int64, sorted.

    Token t overlaps [s, e) when start_t < e and end_t > s. Tokens with an empty span
    (end <= start, e.g. specials at (0, 0)) are ignored.
    """
    off = np.asarray(offsets).reshape(-1, 2)  # (T, 2)
    start, end = off[:, 0], off[:, 1]
    s, e = span
    hit = (end > start) & (start < e) & (end > s)  # (T,)
    return np.flatnonzero(hit).astype(np.int64)


# -- pairs ---------------------------------------------------------------------------------------


@dataclass(frozen=True)
class LinkPair:
    """One line of a link-pairs file, with each word's character span in the text."""

    text: str
    source: str
    target: str
    distractors: tuple[str, ...]
    source_span: Span
    target_span: Span
    distractor_spans: tuple[Span, ...]
    line: int = 0  # 1-based line number in its file; 0 when not read from a file

    @property
    def candidates(self) -> tuple[str, ...]:
        """Target first, then the distractors."""
        return (self.target, *self.distractors)

    @property
    def candidate_spans(self) -> tuple[Span, ...]:
        return (self.target_span, *self.distractor_spans)

    @property
    def where(self) -> str:
        return f"line {self.line}" if self.line else "link pair"


def make_pair(text: str, source: str, target: str, distractors: Sequence[str], line: int = 0) -> LinkPair:
    """Locate every word of a pair in its text; HeadlightError when a word is missing.

    Also refused: two of the words resolving to the same occurrence (e.g. target "it" and
    distractor "IT"), which would make the pair impossible or meaningless.
    """
    where = f"line {line}" if line else "link pair"
    source_span = _locate(text, source, "source", where)
    target_span = _locate(text, target, "target", where)
    d_spans = tuple(_locate(text, w, "distractor", where) for w in distractors)
    seen: dict[Span, str] = {}
    for word, span in zip((source, target, *distractors), (source_span, target_span, *d_spans), strict=True):
        if span in seen:
            raise HeadlightError(f"{where}: '{word}' and '{seen[span]}' are the same word in the text")
        seen[span] = word
    return LinkPair(
        text=text,
        source=source,
        target=target,
        distractors=tuple(distractors),
        source_span=source_span,
        target_span=target_span,
        distractor_spans=d_spans,
        line=line,
    )


def _locate(text: str, word: str, role: str, where: str) -> Span:
    span = find_word(text, word)
    if span is None:
        raise HeadlightError(f"{where}: {role} word '{word}' does not occur in the text")
    return span


def parse_link_pairs(lines: Iterable[str], first_line: int = 1) -> Iterator[LinkPair]:
    """Parse link-pairs JSON lines; HeadlightError naming the line for any invalid line."""
    for number, raw in enumerate(lines, start=first_line):
        if number == 1:
            raw = raw.removeprefix("\ufeff")
        if not raw.strip():
            continue
        yield _parse_line(raw, number)


def _parse_line(raw: str, number: int) -> LinkPair:
    where = f"line {number}"
    obj: Any = json_loads(raw, where)
    if not isinstance(obj, dict):
        raise HeadlightError(f"{where}: expected a JSON object with text, source, target and distractors")
    for name in ("text", "source", "target", "distractors"):
        if name not in obj:
            raise HeadlightError(f"{where}: missing field '{name}'")
    for name in ("text", "source", "target"):
        if not isinstance(obj[name], str) or not obj[name].strip():
            raise HeadlightError(f"{where}: field '{name}' must be a non-empty string")
    distractors = obj["distractors"]
    if (
        not isinstance(distractors, list)
        or not distractors
        or not all(isinstance(w, str) and w.strip() for w in distractors)
    ):
        raise HeadlightError(f"{where}: field 'distractors' must be a non-empty list of words")
    return make_pair(
        obj["text"],
        obj["source"].strip(),
        obj["target"].strip(),
        [w.strip() for w in distractors],
        line=number,
    )


def iter_link_pairs(path: str | PathLike[str]) -> Iterator[LinkPair]:
    """Stream the pairs of a ``.jsonl`` link-pairs file, one line at a time.

    Raises HeadlightError naming the line for invalid JSON, a missing field or a word missing
    from its text, and for a file that is not UTF-8.
    """
    p = Path(path)
    try:
        handle = p.open("rb")
    except OSError as exc:
        raise HeadlightError(f"cannot read {p}: {exc.strerror or exc}") from None
    with handle:
        for number, raw in enumerate(handle, start=1):
            try:
                line = raw.decode("utf-8")
            except UnicodeDecodeError as exc:
                raise HeadlightError(
                    f"{p}: line {number} is not UTF-8 text "
                    f"(byte 0x{raw[exc.start]:02x} at position {exc.start + 1}); "
                    "save the file as UTF-8"
                ) from None
            try:
                yield from parse_link_pairs([line], first_line=number)
            except HeadlightError as exc:
                raise HeadlightError(f"{p}: {exc.message}") from None


def read_link_pairs(path: str | PathLike[str]) -> list[LinkPair]:
    """All pairs of a link-pairs file; HeadlightError when it holds none."""
    pairs = list(iter_link_pairs(path))
    if not pairs:
        raise HeadlightError(f"{Path(path)}: no link pairs in the file")
    return pairs


# -- scores --------------------------------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class PairTokens:
    """Sub-token indices of a pair's words in one tokenisation."""

    source: np.ndarray  # (n_s,) int64, sorted
    candidates: tuple[np.ndarray, ...]  # target first, then distractors; each (n_c,) sorted


def pair_tokens(pair: LinkPair, offsets: np.ndarray) -> PairTokens:
    """Map each word of ``pair`` to its sub-tokens, offsets (T, 2).

    HeadlightError when a word has no sub-token (e.g. the text was cut to the model's length);
    a caller scoring a whole file may catch it to skip the pair.
    """
    source = word_token_indices(pair.source_span, offsets)
    candidates = tuple(word_token_indices(s, offsets) for s in pair.candidate_spans)
    for word, toks in zip((pair.source, *pair.candidates), (source, *candidates), strict=True):
        if toks.size == 0:
            raise HeadlightError(f"{pair.where}: word '{word}' has no tokens (was the text truncated?)")
    return PairTokens(source=source, candidates=candidates)


def link_scores(source_rows: np.ndarray, tokens: PairTokens) -> np.ndarray:
    """Link score of every candidate in every head: (L, H, T) -> (K, L, H) float64.

    score[k, l, h] = sum_{j in candidate k} A[l, h, s, j], s = the source's first sub-token
    (docs/definitions.md, "Link pairs"); ``source_rows`` is every layer's and head's attention
    from s (``Recording.query_rows(s)``). K = 1 + number of distractors, target first.
    """
    row = np.asarray(source_rows, dtype=np.float64)  # (L, H, T)
    return np.stack([row[:, :, c].sum(axis=-1) for c in tokens.candidates])  # (K, L, H)


def heads_correct(scores: np.ndarray) -> np.ndarray:
    """(K, L, H) scores -> (L, H) bool: target (k = 0) strictly above every distractor."""
    s = np.asarray(scores)
    return s[0] > s[1:].max(axis=0)  # (L, H)


def nearest_correct(tokens: PairTokens) -> bool:
    """The nearest baseline: is the target the unique candidate closest to the source?

    Distance is |first sub-token of candidate - first sub-token of source|; a tie for the
    smallest distance counts as wrong.
    """
    s = int(tokens.source[0])
    dist = np.array([abs(int(c[0]) - s) for c in tokens.candidates])  # (K,)
    return bool(dist[0] < dist[1:].min())


@dataclass(frozen=True, eq=False)
class PairResult:
    scores: np.ndarray  # (K, L, H)
    correct: np.ndarray  # (L, H) bool
    nearest: bool


def score_pair(attention_from, offsets: np.ndarray, pair: LinkPair) -> PairResult:
    """Scores, per-head verdict and nearest-baseline verdict for one pair on one text.

    attention_from(i) gives (L, H, T), every layer's and head's attention from query row i.
    """
    tokens = pair_tokens(pair, offsets)
    scores = link_scores(attention_from(int(tokens.source[0])), tokens)
    return PairResult(scores=scores, correct=heads_correct(scores), nearest=nearest_correct(tokens))


class LinkAccuracy:
    """Streaming, mergeable tally of per-head link accuracy and the nearest baseline."""

    __slots__ = ("n_layers", "n_heads", "pairs", "_correct", "_nearest")

    def __init__(self, n_layers: int, n_heads: int) -> None:
        self.n_layers = int(n_layers)
        self.n_heads = int(n_heads)
        self.pairs = 0
        self._correct = np.zeros((self.n_layers, self.n_heads), dtype=np.int64)  # (L, H)
        self._nearest = 0

    def add(self, result: PairResult) -> None:
        if result.correct.shape != (self.n_layers, self.n_heads):
            raise ValueError(f"result is {result.correct.shape}, tally is ({self.n_layers}, {self.n_heads})")
        self.pairs += 1
        self._correct += result.correct
        self._nearest += int(result.nearest)

    def merge(self, other: LinkAccuracy) -> LinkAccuracy:
        if (other.n_layers, other.n_heads) != (self.n_layers, self.n_heads):
            raise ValueError("cannot merge link tallies of different shapes")
        self.pairs += other.pairs
        self._correct += other._correct
        self._nearest += other._nearest
        return self

    def state(self) -> dict[str, np.ndarray]:
        """The tally as plain arrays; ``from_state`` restores it exactly."""
        return {
            "pairs": np.array(self.pairs, dtype=np.int64),
            "correct": self._correct.copy(),
            "nearest": np.array(self._nearest, dtype=np.int64),
        }

    @classmethod
    def from_state(cls, state: dict[str, np.ndarray]) -> LinkAccuracy:
        correct = np.asarray(state["correct"], dtype=np.int64)  # (L, H)
        if correct.ndim != 2:
            raise ValueError(f"not a link-accuracy state: correct {correct.shape}")
        acc = cls(*correct.shape)
        acc.pairs = int(state["pairs"])
        acc._correct[...] = correct
        acc._nearest = int(state["nearest"])
        return acc

    @property
    def accuracy(self) -> np.ndarray:
        """(L, H) share of pairs each head gets right (NaN before any pair)."""
        if self.pairs == 0:
            return np.full((self.n_layers, self.n_heads), np.nan)
        return self._correct / self.pairs

    @property
    def nearest_baseline(self) -> float:
        """Share of pairs the nearest baseline gets right (NaN before any pair)."""
        return self._nearest / self.pairs if self.pairs else float("nan")

    def best(self) -> tuple[int, int, float]:
        """(layer, head, accuracy) of the most accurate head; ties go to the lowest layer, head."""
        acc = self.accuracy
        if self.pairs == 0:
            return 0, 0, float("nan")
        flat = int(np.argmax(acc))
        layer, head = divmod(flat, self.n_heads)
        return layer, head, float(acc[layer, head])

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready: ``pairs``, ``accuracy`` (L x H), ``nearest_baseline``, ``best``."""
        layer, head, acc = self.best()
        return {
            "pairs": self.pairs,
            "accuracy": [[_json_number(v) for v in row] for row in self.accuracy.tolist()],
            "nearest_baseline": _json_number(self.nearest_baseline),
            "best": {"layer": layer, "head": head, "accuracy": _json_number(acc)},
        }


def _json_number(v: float) -> float | None:
    return None if math.isnan(v) else float(v)
