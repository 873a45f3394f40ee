"""The numbers behind each headless command, as JSON-ready dictionaries.

The command line prints these and writes them with ``--json``; the card export puts the very
same dictionaries into ``card.json``, so a card's numbers are those of the commands. Every
report over a set runs through the shard engine (``viewer.reports.shards``) with the command's
``RunOptions``: in this process, on local workers or on a Dask cluster, with a run folder.
"""

from __future__ import annotations

import os
from collections.abc import Callable, Iterable, Sequence
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Any, ClassVar

import numpy as np

from viewer.core.attention import CheckResult, LayerCheck, check_layer, result_of
from viewer.core.links import iter_link_pairs, read_link_pairs
from viewer.core.screen import SHARE as SCREEN_SHARE
from viewer.errors import HeadlightError
from viewer.model.loader import LoadedModel
from viewer.model.runs import TextLayer, scan
from viewer.reports.heads import (
    HeadsKind,
    TextSetScan,
    check_labels,
    normalise_importance,
    predictions,
    predicts,
    require_prediction,
)
from viewer.reports.links import LinksKind
from viewer.reports.progress import shard_bar
from viewer.reports.runfolder import input_digest
from viewer.reports.shards import (
    SERIAL,
    RunOptions,
    Shard,
    ShardKind,
    State,
    require_some,
    run_shards,
    shard_count,
)
from viewer.reports.shortcuts import run_search
from viewer.reports.textsets import TextItem, TextSource, as_source, survey


def _run(
    kind: ShardKind,
    loaded: LoadedModel,
    items: Iterable[Any],
    total: int,
    label: str,
    inputs: Callable[[], dict[str, Any]] | None,
    run: RunOptions,
    quiet: bool,
) -> Any:
    """One report over a set with a progress bar (shards) on stderr.

    ``inputs()`` identifies the input for the run folder (hashing it only when there is one).
    """
    key = inputs() if inputs is not None and run.work is not None else None
    with shard_bar(label, shard_count(total, run.shard_size), quiet=quiet) as on_shard:
        return require_some(
            run_shards(kind, loaded, items, options=run, total=total, inputs=key, on_shard=on_shard)
        )


def _run_set(
    kind: ShardKind,
    loaded: LoadedModel,
    source: TextSource,
    label: str,
    run: RunOptions,
    quiet: bool,
    total: int | None = None,
) -> Any:
    """``_run`` over a text set: its items, counted first (``total``, when the caller has
    counted them already), the run folder keyed by its content."""
    total = survey(source).texts if total is None else total
    return _run(kind, loaded, source.items(), total, label, source.key, run, quiet)


@dataclass(frozen=True)
class CheckKind:
    """The re-derivation check over shards; per head, the worst error over all texts."""

    name: ClassVar[str] = "check"
    tolerance: float
    batch_size: int = 8

    def options(self) -> dict:
        return asdict(self)

    def map(self, loaded: LoadedModel, shard: Shard, check: Callable[[], None]) -> CheckResult:
        """Each layer is checked as soon as the model has run it, and only its errors are kept:
        a text of any length holds one layer's arrays at a time."""
        result: CheckResult | None = None
        for batch in loaded.text.batches([i.text for i in shard.items], self.batch_size):
            check()
            layers: list[list[LayerCheck]] = [[] for _ in batch.lengths]
            own = [False] * len(batch.lengths)

            def sink(i: int, part: TextLayer, layers=layers, own=own) -> None:
                layers[i].append(check_layer(part.scores(), part.v, part.context))
                own[i] = part.own is not None

            scan(loaded, batch, sink)
            for i, checks in enumerate(layers):
                one = result_of(checks, self.tolerance, own[i], batch.truncated_from[i] is not None)
                result = one if result is None else result.merge(one)
        return result

    def state(self, partial: CheckResult) -> State:
        return {
            "prob_errors": partial.prob_errors,
            "context_errors": partial.context_errors,
            "texts": np.array(partial.texts, dtype=np.int64),
            "compared": np.array(partial.compared_probabilities, dtype=np.int64),
            "cut": np.array(partial.cut, dtype=np.int64),
        }

    def load(self, state: State) -> CheckResult:
        return CheckResult(
            self.tolerance,
            np.asarray(state["prob_errors"]),
            np.asarray(state["context_errors"]),
            int(state["texts"]),
            int(state["compared"]),
            int(state["cut"]),
        )


def check_data(
    loaded: LoadedModel,
    texts: str | os.PathLike | TextSource | list[str],
    tolerance: float,
    *,
    run: RunOptions = SERIAL,
    quiet: bool = True,
) -> dict:
    """The re-derivation check over a list of texts or a whole text set."""
    if not (tolerance > 0):
        raise HeadlightError(f"tolerance must be positive, got {tolerance}")
    kind = CheckKind(float(tolerance))
    if isinstance(texts, list):
        items, total, inputs = [TextItem(t, None, n) for n, t in enumerate(texts, 1)], len(texts), None
    else:
        source = as_source(texts)
        items, total, inputs = source.items(), survey(source).texts, source.key
    result = _run(kind, loaded, items, total, "re-derivation check", inputs, run, quiet)
    notes = []
    if isinstance(texts, list) and len(texts) == 1:
        one = loaded.text.encode(texts).cut_note(0)
        if one:
            why = "the model reads" if loaded.max_tokens == loaded.text.model_limit else "--max-tokens"
            notes.append(f"{one} ({why}: {loaded.max_tokens:,})")
    elif result.cut:
        notes.append(loaded.text.cut_note(result.cut, result.texts))
    compared = result.compared_probabilities
    if compared < result.texts:
        notes.append(
            f"{result.texts - compared} of {result.texts} text(s) ran the memory-efficient kernel, which "
            "keeps no probabilities: their check compares the attention output of every head"
        )
    return {"model": str(loaded.folder), "family": loaded.family.name, **result.to_dict(), "notes": notes}


def cut_data(loaded: LoadedModel, texts: Iterable[str]) -> dict:
    """``texts_cut`` and the note saying so, for a set command's JSON."""
    cut, total = loaded.text.count_cut(texts)
    note = loaded.text.cut_note(cut, total)
    return {"texts_cut": cut, "notes": [note] if note else []}


def heads_data(
    loaded: LoadedModel,
    texts: str | os.PathLike | TextSource,
    *,
    batch_size: int = 16,
    importance: bool = True,
    knockout: bool = False,
    quiet: bool = False,
    run: RunOptions = SERIAL,
) -> dict:
    source = as_source(texts)
    info = survey(source)
    importance, knockout = predicts(loaded) and importance, predicts(loaded) and knockout
    use_labels = check_labels(loaded, info) if (importance or knockout) else False
    kind = HeadsKind(batch_size, importance=importance, knockout=knockout, use_labels=use_labels)
    part = _run_set(kind, loaded, source, "head summaries", run, quiet, info.texts)
    data = {"model": str(loaded.folder), **part.stats.summary().to_dict()}
    data.update(cut_data(loaded, (i.text for i in source.items())))
    n = info.texts
    if importance:
        raw = part.extras["importance"] / n
        data["importance"] = normalise_importance(raw).tolist()
        data["importance_raw"] = raw.tolist()
        data["importance_targets"] = "labels" if use_labels else "predictions"
    if knockout:
        data["knockout_prob_drop"] = (part.extras["knockout_drop"] / n).tolist()
        if use_labels:
            data["knockout_accuracy"] = (part.extras["knockout_correct"] / n).tolist()
            data["base_accuracy"] = float(part.extras["base_correct"] / n)
    return data


def predictions_data(
    loaded: LoadedModel,
    texts: str | os.PathLike | TextSource,
    *,
    batch_size: int = 16,
    quiet: bool = False,
    run: RunOptions = SERIAL,
) -> TextSetScan:
    """Every text's prediction and the head summary, as the window's ``scan_text_set``."""
    part = _run_set(HeadsKind(batch_size, rows=True), loaded, as_source(texts), "predictions", run, quiet)
    return TextSetScan(part.stats.summary(), predictions(loaded, part))


def links_data(
    loaded: LoadedModel,
    pairs_path: str | Path,
    *,
    batch_size: int = 16,
    quiet: bool = False,
    run: RunOptions = SERIAL,
) -> dict:
    total = len(read_link_pairs(pairs_path))
    acc = _run(
        LinksKind(batch_size),
        loaded,
        iter_link_pairs(pairs_path),
        total,
        "link scores",
        lambda: {"sha256": input_digest(Path(pairs_path))},
        run,
        quiet,
    )
    cut = cut_data(loaded, (p.text for p in iter_link_pairs(pairs_path)))
    return {"model": str(loaded.folder), **acc.to_dict(), **cut}


def shortcuts_data(
    loaded: LoadedModel,
    texts: str | os.PathLike | TextSource,
    *,
    batch_size: int = 16,
    phrases: bool = True,
    exhaustive: bool = False,
    share: float = SCREEN_SHARE,
    quiet: bool = False,
    run: RunOptions = SERIAL,
) -> dict:
    """``headlight shortcuts``' numbers: screened, or every word with ``exhaustive``."""
    if not 0 < share <= 1:
        raise HeadlightError(f"the confirmation share must be in (0, 1], got {share}")
    require_prediction(loaded, "shortcut search")
    source = as_source(texts)
    total = survey(source).texts

    def one(kind: ShardKind, label: str) -> Any:
        return _run_set(kind, loaded, source, label, run, quiet, total)

    report = run_search(
        loaded, one, batch_size=batch_size, phrases=phrases, exhaustive=exhaustive, share=share
    )
    cut = cut_data(loaded, (i.text for i in source.items()))
    data = {"model": str(loaded.folder), **report.to_dict(), **cut}
    cue = cue_data(loaded, source, data, batch_size=batch_size, quiet=quiet, run=run)
    if cue is not None:
        data["cue_accuracy"] = cue
    return data


def cue_data(
    loaded: LoadedModel,
    source: TextSource,
    shortcuts: dict,
    *,
    batch_size: int = 16,
    quiet: bool = False,
    run: RunOptions = SERIAL,
) -> dict | None:
    """Set accuracy as given, with the strongest shortcut candidate removed and with it
    inserted (``viewer.reports.cue``), for a classifier on a labelled set; None otherwise."""
    from viewer.reports.cue import CueAccuracyKind, cue_accuracy_data, strongest_candidate
    from viewer.reports.insertion import insertion_phrase

    best = strongest_candidate(shortcuts)
    counted = survey(source)
    if best is None or loaded.head_kind != "classifier" or not check_labels(loaded, counted):
        return None
    cue = insertion_phrase(source.items(), best["token"])
    kind = CueAccuracyKind(cue, batch_size)
    counts = _run_set(kind, loaded, source, f"accuracy without and with '{cue}'", run, quiet, counted.texts)
    return cue_accuracy_data(loaded.labels, cue, counts)


def search_mode(data: dict) -> str:
    """One line saying which shortcut search ran and what it cost, from its JSON."""
    if data["mode"] == "exhaustive":
        return (
            f"exhaustive search: every word and phrase of every text knocked out "
            f"({data['confirmed']} keys, {data['forwards']} forward passes)"
        )
    return (
        f"screened search: {data['screened']} words and phrases seen in >= 3 texts screened "
        f"(gradient × input, association, focus), {data['confirmed']} confirmed by knockout "
        f"({data['forwards']} forward passes, {data['backwards']} backward); "
        "--exhaustive knocks out every word"
    )


def insertion_data(
    loaded: LoadedModel,
    texts: str | os.PathLike | TextSource,
    phrase: str,
    *,
    target: str | None = None,
    seed: int = 0,
    batch_size: int = 16,
    quiet: bool = False,
    run: RunOptions = SERIAL,
    by_class: np.ndarray | None = None,
    heads: Sequence[tuple[int, int]] = (),
) -> dict:
    """``headlight insert``'s numbers; ``by_class``: the phrase's per-class knockout breakdown
    when a shortcut search already has it (``viewer.reports.insertion.run_insertion``); ``heads``:
    also the mechanism check with those heads knocked out."""
    from viewer.reports.insertion import run_insertion

    source = as_source(texts)
    total = survey(source).texts
    report = run_insertion(
        loaded,
        phrase,
        target,
        seed,
        batch_size,
        lambda kind, label: _run_set(kind, loaded, source, label, run, quiet, total),
        by_class,
        heads,
    )
    return {"model": str(loaded.folder), **report.to_dict()}
