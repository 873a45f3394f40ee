"""Which (L, H) values the head map shows for the current selection (plain Python + numpy).

``head_values(state)`` returns a ``HeadValues`` (values, colour-bar label, diverging or not, a
title) or a ``str`` saying why there is nothing to show yet (e.g. "select a source and a target
token"). The head-map pane only draws what this returns.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from viewer.core.headstats import METRICS as STAT_METRICS
from viewer.session.analysis import TextAnalysis, per_head_link
from viewer.session.state import HEAD_MAP_METRICS, Selection

EVIDENCE_METRICS = {"importance": "head_importance", "knockout": "head_knockout"}
SIGNED_METRICS = {"knockout"}
"""Metrics whose sign means something (a knocked-out head can raise the prediction's
probability): drawn on a diverging scale centred at 0, as differences are."""


@dataclass(frozen=True, eq=False)
class HeadValues:
    values: np.ndarray  # (L, H)
    label: str  # colour-bar label with units
    diverging: bool
    title: str


def run_metric(
    state: Selection, analysis: TextAnalysis | None, evidence, name: str, scope: str
) -> np.ndarray | str:
    """The metric for one run (the current text, the compared one, or the text set)."""
    if name in STAT_METRICS:
        if scope == "set":
            ts = state.textset
            if ts is None:
                return "open a text set to see summaries over it"
            return np.asarray(getattr(ts.heads, name))
        if analysis is None:
            return "run a text to see the head map"
        if analysis.heads is None:
            return "computing the head metrics of this text…"
        return np.asarray(analysis.metric(name))
    if analysis is None:
        return "run a text to see the head map"
    if name == "link":
        s, t = state.source, state.target
        n = analysis.recording.n_tokens
        if s is None or t is None or s >= n or t >= n:
            return (
                "link scores need a source and a target: click a cell of the pair grid "
                "(its row is the source token, its column the target)"
            )
        return per_head_link(analysis, s, t)
    if name in ("importance", "knockout"):
        if evidence is None:
            return f"{HEAD_MAP_METRICS[name][0]} appears once the evidence for this text is computed"
        values = getattr(evidence, EVIDENCE_METRICS[name], None)
        if values is None:
            return f"{HEAD_MAP_METRICS[name][0]} is not available for this model or text"
        return np.asarray(values)
    return f"unknown metric {name}"


def available(state: Selection, name: str) -> bool:
    return not isinstance(run_metric(state, state.analysis, state.evidence, name, state.scope), str)


def head_values(state: Selection) -> HeadValues | str:
    name = state.metric
    label = HEAD_MAP_METRICS[name][1]
    scope = state.scope if name in STAT_METRICS else "text"
    base = run_metric(state, state.analysis, state.evidence, name, scope)
    if isinstance(base, str):
        return base
    where = "over the text set" if scope == "set" else "this text"
    if state.difference and state.compare is not None:
        if name in ("importance", "knockout"):
            return f"the difference view needs {HEAD_MAP_METRICS[name][0]} of both runs; pick another metric"
        if scope == "set":
            return "the difference view compares two single texts; switch the scope to this text"
        other = run_metric(state, state.compare, None, name, "text")
        if isinstance(other, str):
            return other
        if np.shape(other) != np.shape(base):
            return "the compared checkpoint has a different number of layers or heads"
        difference = np.asarray(other) - base
        if not np.any(np.nan_to_num(difference)):
            # a colour bar of ±1e-12 would paint noise: the runs agree exactly
            return f"identical: the compared run gives the same {HEAD_MAP_METRICS[name][0]} in every head"
        return HeadValues(difference, f"Δ {label}", True, f"{HEAD_MAP_METRICS[name][0]}: compared − current")
    return HeadValues(
        np.asarray(base), label, name in SIGNED_METRICS, f"{HEAD_MAP_METRICS[name][0]} · {where}"
    )
