"""Head summaries over a text set: streaming head metrics, head importance, head knockout.

All of it is one report kind, ``HeadsKind``, mapped over the set's shards
(``viewer.reports.shards``): per shard, the model's attention of every text folds into a
``HeadStats``; on request the same shard also yields each text's prediction, the head-importance
sums (Michel et al. 2019, Eq. 2) and the head-knockout sums. ``headlight heads``, the card and
the window's text-set scope all run this kind, so they show the same numbers.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable, Sequence
from dataclasses import asdict, dataclass
from typing import Any, ClassVar

import numpy as np

from viewer.core.headstats import HeadStats, HeadSummary
from viewer.errors import HeadlightError
from viewer.model.attribution import head_importance_sums, head_knockout_effects
from viewer.model.loader import LoadedModel
from viewer.model.runs import attentions
from viewer.reports.shards import SERIAL, RunOptions, Shard, State, run_report
from viewer.reports.textsets import Survey, TextItem


def label_index(loaded: LoadedModel, item: TextItem) -> int:
    """The class index of an item's label; HeadlightError naming the line when it has none."""
    if item.label is None:
        raise HeadlightError(f"{item.where} has no label while others do")
    try:
        return loaded.labels.index(item.label)
    except ValueError:
        known = ", ".join(loaded.labels)
        raise HeadlightError(f"{item.where}: label {item.label!r} is not one of {known}") from None


def label_indices(loaded: LoadedModel, items: Sequence[TextItem]) -> list[int] | None:
    """Class indices of the items' labels, None when no item has a label."""
    if all(i.label is None for i in items):
        return None
    return [label_index(loaded, item) for item in items]


def check_labels(loaded: LoadedModel, survey: Survey) -> bool:
    """Whether a classifier's set is labelled (then every text must be, with a known label)."""
    if loaded.head_kind != "classifier" or survey.labelled == 0:
        return False
    if survey.first_unlabelled is not None:
        label_index(loaded, survey.first_unlabelled)
    for item in survey.labels.values():
        label_index(loaded, item)
    return True


def predicts(loaded: LoadedModel) -> bool:
    """Whether the model makes a prediction to explain or knock out: a sequence classifier's
    class or a causal LM's next token (a masked LM or a bare encoder does not)."""
    return loaded.head_kind in ("classifier", "causal-lm")


def require_prediction(loaded: LoadedModel, what: str) -> None:
    """HeadlightError naming ``what`` when the model has no prediction to knock out (neither a
    sequence classifier nor a causal LM)."""
    if not predicts(loaded):
        raise HeadlightError(
            f"{what} needs a prediction to knock out; {loaded.name} has no classifier or "
            f"language-model head (head kind: {loaded.head_kind}); use a sequence classifier "
            "or a causal LM"
        )


def _no_rows(*_args) -> list[int]:
    return []


@dataclass(frozen=True, eq=False)
class TextPrediction:
    """One text's prediction: class index and label (a classifier's class, or a causal LM's
    next token), its probability, and the text's token count. None without a prediction head."""

    index: int  # position in the set, from 0
    predicted: int | None
    label: str | None
    confidence: float | None
    tokens: int


@dataclass(frozen=True, eq=False)
class TextSetScan:
    """What one pass over a set gives the window: per-text predictions and the head summary."""

    heads: HeadSummary
    rows: tuple[TextPrediction, ...]

    @property
    def texts(self) -> int:
        return len(self.rows)


class HeadsPartial:
    """One shard's (or several merged shards') head metrics and, as asked, the extras."""

    def __init__(self, stats: HeadStats, extras: State):
        self.stats = stats
        self.extras = extras  # predicted/confidence/tokens (N,), importance (L, H), knockout sums

    def merge(self, other: HeadsPartial) -> HeadsPartial:
        self.stats.merge(other.stats)
        for key, value in other.extras.items():
            if key in ("predicted", "confidence", "tokens"):
                self.extras[key] = np.concatenate([self.extras[key], value])
            else:
                self.extras[key] = self.extras[key] + value
        return self


@dataclass(frozen=True)
class HeadsKind:
    """Head summaries over shards; ``rows``, ``importance``, ``knockout`` add the extras.

    ``use_labels``: importance and knockout accuracy against the set's labels (a set-wide
    choice made before the run, ``check_labels``), else against the model's own predictions.
    """

    name: ClassVar[str] = "heads"
    batch_size: int = 16
    rows: bool = False
    importance: bool = False
    knockout: bool = False
    use_labels: bool = False

    def options(self) -> dict[str, Any]:
        return asdict(self)

    def map(self, loaded: LoadedModel, shard: Shard, check: Callable[[], None]) -> HeadsPartial:
        stats = HeadStats(loaded.n_layers, loaded.n_heads)
        texts = [i.text for i in shard.items]
        predicted, confidence, tokens = [], [], []
        for start in range(0, len(texts), self.batch_size):
            check()
            batch = texts[start : start + self.batch_size]
            for att in attentions(loaded, batch, self.batch_size, rows=_no_rows, stats=stats):
                k = -1 if att.target is None else int(np.argmax(att.target))
                predicted.append(k)
                confidence.append(np.nan if att.target is None else float(att.target[k]))
                tokens.append(len(att.token_ids))
        extras: State = {}
        if self.rows:
            extras["predicted"] = np.array(predicted, dtype=np.int64)
            extras["confidence"] = np.array(confidence, dtype=np.float64)
            extras["tokens"] = np.array(tokens, dtype=np.int64)
        labels = [label_index(loaded, i) for i in shard.items] if self.use_labels else None
        if self.importance:
            check()
            targets = labels if labels is not None else predicted
            extras["importance"] = head_importance_sums(loaded, texts, targets, self.batch_size)
        if self.knockout:
            check()
            n = len(texts)
            ko = head_knockout_effects(loaded, texts, labels, self.batch_size)
            # per-shard means back to sums; merged sums / N are the set's means
            extras["knockout_drop"] = ko["prob_drop"] * n
            if labels is not None:
                extras["knockout_correct"] = np.rint(ko["accuracy"] * n).astype(np.int64)
                extras["base_correct"] = np.rint(ko["base_accuracy"] * n).astype(np.int64)
        return HeadsPartial(stats, extras)

    def state(self, partial: HeadsPartial) -> State:
        return {
            **{f"stats.{k}": v for k, v in partial.stats.state().items()},
            **{f"extra.{k}": v for k, v in partial.extras.items()},
        }

    def load(self, state: State) -> HeadsPartial:
        stats = HeadStats.from_state({k[6:]: v for k, v in state.items() if k.startswith("stats.")})
        return HeadsPartial(stats, {k[6:]: v for k, v in state.items() if k.startswith("extra.")})


def predictions(loaded: LoadedModel, partial: HeadsPartial) -> tuple[TextPrediction, ...]:
    """Per-text predictions from a merged ``HeadsKind(rows=True)`` run."""
    rows = []
    for index, (k, p, t) in enumerate(
        zip(
            partial.extras["predicted"].tolist(),
            partial.extras["confidence"].tolist(),
            partial.extras["tokens"].tolist(),
            strict=True,
        )
    ):
        if k < 0:
            rows.append(TextPrediction(index, None, None, None, t))
            continue
        if loaded.head_kind == "classifier":
            label = loaded.labels[k] if k < len(loaded.labels) else str(k)
        else:
            label = loaded.tokenizer.convert_ids_to_tokens(k)
        rows.append(TextPrediction(index, k, label, p, t))
    return tuple(rows)


def scan_text_set(
    loaded: LoadedModel,
    items: Iterable[TextItem],
    *,
    batch_size: int = 16,
    progress: Callable[[int, int | None], None] | None = None,
    cancelled: Callable[[], bool] | None = None,
    options: RunOptions = SERIAL,
) -> TextSetScan:
    """The window's text-set pass: every text's prediction and the set's ``HeadSummary``.

    One pass of the model over the set, shard by shard, in this process unless ``options`` say
    otherwise. The head summary is the one ``headlight heads`` prints for the same set, to the
    last bit (same kind, same shards; keep the default ``batch_size`` and shard size).
    ``progress(done, total)`` is called after every shard with the texts done so far (total is
    None for a stream of unknown length); ``cancelled()`` is asked between shards and batches
    and ends the run with ``viewer.reports.shards.Cancelled``.
    """
    part = run_report(
        HeadsKind(batch_size, rows=True),
        loaded,
        items,
        options=options,
        progress=progress,
        cancelled=cancelled,
    )
    return TextSetScan(part.stats.summary(), predictions(loaded, part))


def head_importance(
    loaded: LoadedModel,
    items: Sequence[TextItem],
    batch_size: int = 16,
    progress: Callable[[int], None] | None = None,
) -> dict[str, np.ndarray]:
    """Head importance (Michel et al. 2019, Eq. 2), ℓ2-normalised per layer as in their §4.

    Targets are the file's labels when present, else the model's own predictions.
    """
    require_prediction(loaded, "head importance")
    texts = [i.text for i in items]
    targets = label_indices(loaded, items) if loaded.head_kind == "classifier" else None
    source = "labels"
    if targets is None:
        source = "predictions"
        targets = []
        for start in range(0, len(texts), batch_size):
            targets.extend(
                loaded.predict(loaded.encode(texts[start : start + batch_size])).argmax(axis=1).tolist()
            )
    raw = head_importance_sums(loaded, texts, targets, batch_size, progress) / len(texts)
    return {"importance": normalise_importance(raw), "importance_raw": raw, "importance_targets": source}


def normalise_importance(raw: np.ndarray) -> np.ndarray:
    """Each layer's importance row scaled to unit ℓ2 norm (Michel et al. 2019, §4)."""
    norms = np.linalg.norm(raw, axis=1, keepdims=True)
    return np.divide(raw, norms, out=np.zeros_like(raw), where=norms > 0)


def head_knockout(
    loaded: LoadedModel,
    items: Sequence[TextItem],
    batch_size: int = 16,
    progress: Callable[[int], None] | None = None,
) -> dict[str, np.ndarray]:
    """Each head knocked out alone: mean drop of the predicted-class probability, accuracy."""
    require_prediction(loaded, "head knockout")
    labels = label_indices(loaded, items) if loaded.head_kind == "classifier" else None
    return head_knockout_effects(loaded, [i.text for i in items], labels, batch_size, progress)
