"""The numbers behind each headless command, as JSON-ready dictionaries.

The command line prints these and writes them with ``--json``; the card export puts the very
same dictionaries into ``card.json``, so a card's numbers are those of the commands.
"""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path

from viewer.core.attention import check_recordings
from viewer.core.links import read_link_pairs
from viewer.errors import HeadlightError
from viewer.model.loader import LoadedModel
from viewer.reports.heads import head_importance, head_knockout, head_summary
from viewer.reports.links import link_report
from viewer.reports.progress import Progress
from viewer.reports.shortcuts import shortcut_search
from viewer.reports.textsets import load_text_set, read_text_set


def _count(path: str | Path) -> int:
    """Number of texts in a text-set file by a streaming pass; refuses an empty set."""
    total = sum(1 for _ in read_text_set(path))
    if not total:
        raise HeadlightError(f"{Path(path).name} holds no texts")
    return total


def check_data(loaded: LoadedModel, texts: Sequence[str], tolerance: float) -> dict:
    if not (tolerance > 0):
        raise HeadlightError(f"tolerance must be positive, got {tolerance}")
    result = check_recordings(loaded.record_many(texts, batch_size=8), tolerance)
    return {"model": str(loaded.folder), "family": loaded.family.name, **result.to_dict()}


def heads_data(loaded: LoadedModel, texts_path: str | Path, *, batch_size: int = 16,
               importance: bool = True, knockout: bool = False, quiet: bool = False) -> dict:
    total = _count(texts_path)
    with Progress(total, "head summaries", enabled=not quiet) as bar:
        summary = head_summary(loaded, read_text_set(texts_path), batch_size, bar)
    data = {"model": str(loaded.folder), **summary.to_dict()}
    prediction = loaded.head_kind in ("classifier", "causal-lm")
    if prediction and (importance or knockout):
        items = load_text_set(texts_path)
    if prediction and importance:
        with Progress(len(items), "head importance", enabled=not quiet) as bar:
            imp = head_importance(loaded, items, batch_size, bar)
        data["importance"] = imp["importance"].tolist()
        data["importance_raw"] = imp["importance_raw"].tolist()
        data["importance_targets"] = imp["importance_targets"]
    if prediction and knockout:
        with Progress(loaded.n_layers * loaded.n_heads, "head knockout",
                      enabled=not quiet) as bar:
            ko = head_knockout(loaded, items, batch_size, bar)
        data["knockout_prob_drop"] = ko["prob_drop"].tolist()
        if "accuracy" in ko:
            data["knockout_accuracy"] = ko["accuracy"].tolist()
            data["base_accuracy"] = float(ko["base_accuracy"])
    return data


def links_data(loaded: LoadedModel, pairs_path: str | Path, *, batch_size: int = 16,
               quiet: bool = False) -> dict:
    pairs = read_link_pairs(pairs_path)
    if not pairs:
        raise HeadlightError(f"{Path(pairs_path).name} holds no link pairs")
    with Progress(len(pairs), "link scores", enabled=not quiet) as bar:
        acc = link_report(loaded, pairs, batch_size, bar)
    return {"model": str(loaded.folder), **acc.to_dict()}


def shortcuts_data(loaded: LoadedModel, texts_path: str | Path, *, batch_size: int = 16,
                   phrases: bool = True, quiet: bool = False) -> dict:
    total = _count(texts_path)
    with Progress(total, "word knockout", enabled=not quiet) as bar:
        report = shortcut_search(loaded, read_text_set(texts_path), batch_size=batch_size,
                                 phrases=phrases, keep_examples=False, progress=bar)
    return {"model": str(loaded.folder), **report.to_dict()}


def insertion_data(loaded: LoadedModel, texts_path: str | Path, phrase: str, *,
                   target: str | None = None, seed: int = 0, batch_size: int = 16,
                   quiet: bool = False) -> dict:
    from viewer.reports.insertion import insertion_test

    items = load_text_set(texts_path)
    with Progress(len(items), "insertion test", enabled=not quiet) as bar:
        report = insertion_test(loaded, items, phrase, target, seed=seed,
                                batch_size=batch_size, progress=bar)
    return {"model": str(loaded.folder), **report.to_dict()}
