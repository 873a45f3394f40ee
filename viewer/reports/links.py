"""Per-head link accuracy over a link-pairs file (DESIGN.md, "Link pairs")."""

from __future__ import annotations

from collections.abc import Callable, Iterable

from viewer.core.links import LinkAccuracy, LinkPair, score_pair
from viewer.errors import HeadlightError
from viewer.model.loader import LoadedModel
from viewer.reports.textsets import chunks


def link_report(loaded: LoadedModel, pairs: Iterable[LinkPair], batch_size: int = 16,
                progress: Callable[[int], None] | None = None) -> LinkAccuracy:
    """Score every pair in every head; accuracy (L, H) and the nearest baseline."""
    acc = LinkAccuracy(loaded.n_layers, loaded.n_heads)
    for chunk in chunks(pairs, batch_size * 4):
        atts = loaded.attentions([p.text for p in chunk], batch_size=batch_size)
        for pair, att in zip(chunk, atts, strict=True):
            acc.add(score_pair(att.probs, att.offsets, pair))
        if progress:
            progress(len(chunk))
    if acc.pairs == 0:
        raise HeadlightError("the link-pairs file holds no pairs")
    return acc
