"""Per-head link accuracy over a link-pairs file (docs/definitions.md, "Link pairs").

A report kind (``LinksKind``) mapped over shards of pairs (``viewer.reports.shards``): each
shard folds into its own ``LinkAccuracy``; the tallies merge in shard order.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable
from dataclasses import asdict, dataclass
from typing import ClassVar

from viewer.core.links import LinkAccuracy, LinkPair, pair_tokens, score_pair
from viewer.model.loader import LoadedModel
from viewer.model.runs import attentions
from viewer.reports.shards import SERIAL, RunOptions, Shard, State, run_report


@dataclass(frozen=True)
class LinksKind:
    """Every pair scored in every head; the partial is a ``LinkAccuracy``."""

    name: ClassVar[str] = "links"
    batch_size: int = 16

    def options(self) -> dict:
        return asdict(self)

    def map(self, loaded: LoadedModel, shard: Shard, check: Callable[[], None]) -> LinkAccuracy:
        acc = LinkAccuracy(loaded.n_layers, loaded.n_heads)
        pairs = list(shard.items)
        for start in range(0, len(pairs), self.batch_size):
            check()
            chunk = pairs[start : start + self.batch_size]
            atts = attentions(
                loaded,
                [p.text for p in chunk],
                self.batch_size,
                rows=lambda i, offsets, _special, chunk=chunk: [pair_tokens(chunk[i], offsets).source[0]],
            )
            for pair, att in zip(chunk, atts, strict=True):
                acc.add(score_pair(att.attention_from, att.offsets, pair))
        return acc

    def state(self, partial: LinkAccuracy) -> State:
        return partial.state()

    def load(self, state: State) -> LinkAccuracy:
        return LinkAccuracy.from_state(state)


def link_report(
    loaded: LoadedModel,
    pairs: Iterable[LinkPair],
    batch_size: int = 16,
    progress: Callable[..., None] | None = None,
    cancelled: Callable[[], bool] | None = None,
    options: RunOptions = SERIAL,
) -> LinkAccuracy:
    """Score every pair in every head: the reports' ``LinkAccuracy`` (accuracy (L, H), the
    nearest baseline, ``best()``, ``to_dict()``), for the window and ``headlight links``.

    ``progress(done, total)`` is called after every shard with the pairs done so far;
    ``cancelled()`` is asked between shards and batches and ends the run with
    ``viewer.reports.shards.Cancelled``.
    """
    return run_report(
        LinksKind(batch_size),
        loaded,
        pairs,
        options=options,
        progress=progress,
        cancelled=cancelled,
        empty="the link-pairs file holds no pairs",
    )
