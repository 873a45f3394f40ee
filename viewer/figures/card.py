"""The card's figures, drawn from the card's numbers (``viewer.reports.card.card_data``).

``card_figures(data)`` returns one matplotlib figure per figure of the card, by the same
builders the window's panes use; it computes nothing and writes nothing (the folder is written
by ``viewer.session.exports.export_card``).
"""

from __future__ import annotations

import numpy as np
from matplotlib.figure import Figure

from viewer.figures.evidence import evidence_into
from viewer.figures.export import PRINT_SIZE
from viewer.figures.fixation import X_UNITS, fixation_into
from viewer.figures.head_map import head_map_into
from viewer.figures.insertion import insertion_into
from viewer.figures.links import accuracy_into
from viewer.model.names import short_name
from viewer.reports.evidence import ROW_LABELS, ROWS, strip_agreement


def _figure() -> Figure:
    return Figure(figsize=PRINT_SIZE, dpi=100)


def card_figures(data: dict) -> dict[str, Figure]:
    """name -> figure for every figure the card's numbers call for, in the card's order."""
    made: dict[str, Figure] = {}
    model = short_name(data["model"].get("name") or data["model"]["folder"])  # as the window names it
    heads = data["heads"]
    head_maps = (
        (
            "head_entropy",
            "entropy",
            "mean entropy (0–1, normalised)",
            f"{model} · head map · mean entropy over {heads['texts']} texts",
        ),
        (
            "head_importance",
            "importance",
            "head importance (unit norm per layer)",
            f"{model} · head importance (Michel et al. 2019), {heads.get('importance_targets')} as targets",
        ),
    )
    for name, key, label, title in head_maps:
        if key in heads:
            fig = made[name] = _figure()
            head_map_into(fig, np.asarray(heads[key], dtype=float), label=label, title=title)
    if "links" in data:
        links = data["links"]
        fig = made["link_accuracy"] = _figure()
        accuracy_into(
            fig,
            np.asarray(links["accuracy"], dtype=float),
            nearest_baseline=links["nearest_baseline"],
            pairs=links["pairs"],
        )
    sc = data.get("shortcuts")
    if sc and sc["tokens"]:
        rows = sc["tokens"]
        fig = made["fixation"] = _figure()
        fixation_into(
            fig,
            [r["token"] for r in rows],
            [r["focus"] for r in rows],
            [r["mean_drop"] for r in rows],
            [r["count"] for r in rows],
            x_units=f"{X_UNITS}, head mean",
            title=f"{model} · fixation plot · {len(rows)} words, {sc['texts']} texts",
        )
    ins = data.get("insertion")
    if ins and "not_run" not in ins and any(r["tried"] for r in ins["positions"]):
        fig = made["insertion"] = Figure(figsize=(PRINT_SIZE[0], 2.6), dpi=100)
        insertion_into(fig, ins)
    if "example" in data:
        ex = data["example"]
        shown = [k for k in ROWS if any(v is not None for v in ex["rows"][k])]  # as the window's strip
        values = np.array([[np.nan if v is None else v for v in ex["rows"][k]] for k in shown])
        rho = [strip_agreement(k, ex["agreement_with_knockout"], ex.get("agreement_withheld")) for k in shown]
        labels = list(ex["probabilities"])
        fig = made["evidence_example"] = Figure(figsize=(9.0, 3.6), dpi=100)
        evidence_into(
            fig,
            ex["tokens"],
            [ROW_LABELS[k] for k in shown],
            values,
            rho,
            labels=labels,
            probabilities=np.array(list(ex["probabilities"].values())),
            predicted=ex["target"] if labels else None,
            title=f"{model} · evidence strip · predicted {ex['target_label']}",
        )
    return made
