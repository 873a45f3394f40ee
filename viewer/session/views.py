"""What a pane shows, computed once for the pane and for its export (plain Python + numpy).

``link_view`` gives the links pane's numbers for a source (and target) token: the link score
from the source's word to every word unit in the selected head (or the head mean) and, with a
target, the per-head score to the target's word (docs/definitions.md, "Link pairs"). The pane
draws it and ``viewer.session.exports.links_export`` writes it, so the two cannot differ.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from viewer.session.analysis import TextAnalysis, per_head_link, unit_links


@dataclass(frozen=True, eq=False)
class LinkView:
    scores: np.ndarray  # (K units,) link score from the source's word to every unit
    per_head: np.ndarray | None  # (L, H) score to the target's word, None without a target
    source_unit: int
    target_unit: int | None
    source_name: str
    target_name: str | None


def link_view(
    analysis: TextAnalysis, layer: int, head: int | None, source: int, target: int | None
) -> LinkView:
    """The links pane's numbers from token ``source`` (and to token ``target``, when it is one
    of the text's tokens) in ``layer`` · ``head`` (None: the head mean)."""
    u = analysis.units
    scores = unit_links(analysis, layer, head, source)
    per_head = target_unit = None
    if target is not None and target < analysis.recording.n_tokens:
        per_head = per_head_link(analysis, source, target)
        target_unit = u.unit_of(target)
    source_unit = u.unit_of(source)
    return LinkView(
        scores,
        per_head,
        source_unit,
        target_unit,
        u.names[source_unit],
        None if target_unit is None else u.names[target_unit],
    )
