"""The evidence strip: per-token evidence for one prediction, one row per piece of evidence.

Columns are the text's tokens, rows are the pieces of evidence (summary-token attention,
rollout, flow, value-weighted norm, gradient × input, integrated gradients, knockout, ...). The
rows are on different scales, so each row is divided by its own largest absolute value for display: the
colours compare tokens *within* a row. When any row is signed the strip uses the diverging map
centred on zero. Each row's rank agreement with knockout (Spearman's ρ) is written at its right.
A small bar chart beside the strip gives the class probabilities of the prediction.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from matplotlib.axes import Axes
from matplotlib.colorbar import Colorbar
from matplotlib.figure import Figure
from matplotlib.image import AxesImage
from matplotlib.patches import Rectangle
from matplotlib.text import Text

from viewer.figures import style
from viewer.figures.layout import Box, InchLayout, line_height_in, text_width_in

ROW_UNITS = "share of\nrow maximum"


@dataclass
class EvidenceArtists:
    ax: Axes
    image: AxesImage
    colorbar: Colorbar | None
    marker: Rectangle
    n_tokens: int
    row_labels: tuple[str, ...]
    signed: bool
    agreements: tuple[Text, ...] = ()  # the ρ written right of each row

    def thin_rows(self, height_px: float) -> None:
        """Show the ρ of the rows the y axis labels (``style.IndexLocator``) at this height."""
        need = style.FONT_SIZE * style.ROW_SPACING * self.ax.figure.dpi / 72.0
        step = style.index_step(len(self.row_labels), height_px, need)
        for row, text in enumerate(self.agreements):
            text.set_visible(row % step == 0)


def normalise_rows(values: np.ndarray) -> np.ndarray:
    """Each row divided by its largest |value| (rows of zeros stay zero; NaN stays NaN): (K, T)."""
    v = np.asarray(values, dtype=np.float64)
    if v.ndim != 2:
        raise ValueError(f"evidence needs (rows, tokens) values, got shape {v.shape}")
    with np.errstate(invalid="ignore"):
        peak = np.nanmax(np.abs(v), axis=1, keepdims=True) if v.shape[1] else np.ones((len(v), 1))
    peak = np.where(np.isfinite(peak) & (peak > 0), peak, 1.0)
    return v / peak


def agreement_text(rho: float | str | None) -> str:
    """``ρ +0.62`` for a Spearman coefficient, ``ρ –`` when there is none; text as it is."""
    if isinstance(rho, str):
        return rho
    if rho is None or not np.isfinite(rho):
        return "ρ –"
    return f"ρ {rho:+.2f}"


def draw_evidence_strip(
    ax: Axes,
    tokens: Sequence[str],
    row_labels: Sequence[str],
    values: np.ndarray,
    agreement: Sequence[float | str | None] | None = None,
    *,
    cax: Axes | None = None,
    title: str | None = None,
) -> EvidenceArtists:
    """Draw the strip of ``values`` (K rows, T tokens) into ``ax``, rows normalised for display."""
    shown = normalise_rows(values)
    n_rows, n_tokens = shown.shape
    if len(row_labels) != n_rows or len(tokens) != n_tokens:
        raise ValueError(f"{len(row_labels)} rows × {len(tokens)} tokens for values {shown.shape}")
    signed = bool(np.nanmin(shown) < 0) if shown.size and np.isfinite(shown).any() else False
    if signed:
        cmap, norm = style.diverging_cmap(), style.diverging_norm(np.array([-1.0, 1.0]))
    else:
        cmap, norm = style.sequential_cmap(), style.sequential_norm(np.array([0.0, 1.0]))
    image = style.cell_grid(ax, np.ma.masked_invalid(shown), cmap=cmap, norm=norm)
    style.set_token_axis(ax, "x", tokens, rotate=True)
    style.set_index_axis(ax, "y", row_labels)
    ax.tick_params(axis="y", length=0, labelsize=style.FONT_SIZE)
    agreement = list(agreement) if agreement is not None else [None] * n_rows
    agreements = [
        ax.text(
            1.012,
            row,
            agreement_text(rho),
            transform=ax.get_yaxis_transform(),
            ha="left",
            va="center",
            fontsize=style.FONT_SIZE,
            color="#222222",
        )
        for row, rho in enumerate(agreement)
    ]
    if title:
        ax.set_title(title, fontsize=style.TITLE_SIZE, loc="left")
    marker = Rectangle(
        (0, -0.5), 1, n_rows, fill=False, edgecolor=style.SELECTION, linewidth=1.6, visible=False, zorder=3
    )
    ax.add_patch(marker)
    colorbar = None
    if cax is not None:
        colorbar = ax.figure.colorbar(image, cax=cax)
        style.style_colorbar(colorbar, ROW_UNITS)
    return EvidenceArtists(
        ax, image, colorbar, marker, n_tokens, tuple(row_labels), signed, tuple(agreements)
    )


def mark_token(artists: EvidenceArtists, token: int | None) -> None:
    """Outline one token's column (the selected source token), or nothing."""
    if token is None or not 0 <= token < artists.n_tokens:
        artists.marker.set_visible(False)
        return
    artists.marker.set_bounds(token - 0.5, -0.5, 1, len(artists.row_labels))
    artists.marker.set_visible(True)


def draw_class_probabilities(
    ax: Axes,
    labels: Sequence[str],
    probabilities: np.ndarray,
    predicted: int | None = None,
    gold: str | None = None,
) -> None:
    """Horizontal bars of class probabilities; the predicted class filled, the label marked."""
    p = np.asarray(probabilities, dtype=np.float64)
    n = len(p)
    colours = [style.SELECTION if i == predicted else style.ACCENT for i in range(n)]
    ax.barh(range(n), p, color=colours, height=0.62, zorder=2)
    ax.set_xlim(0, 1)
    ax.set_ylim(n - 0.5, -0.5)
    names = [f"{name} ●" if gold is not None and name == gold else name for name in labels]
    ax.set_yticks(range(n), names)
    ax.tick_params(axis="y", length=0, labelsize=style.FONT_SIZE)
    ax.set_xticks([0, 0.5, 1], ["0", "0.5", "1"])
    style.style_axes(ax)
    for i, value in enumerate(p):
        inside = value > 0.62
        ax.text(
            value - 0.03 if inside else value + 0.03,
            i,
            f"{value:.2f}",
            ha="right" if inside else "left",
            va="center",
            fontsize=style.FONT_SIZE,
            color="white" if inside else "#222222",
            zorder=3,
        )
    ax.set_xlabel("class probability", fontsize=style.LABEL_SIZE)
    if gold is not None:
        ax.set_title("● = label", fontsize=style.FONT_SIZE, loc="left", color=style.MUTED)


def prediction_line(
    labels: Sequence[str], probabilities: np.ndarray, predicted: int | None, gold: str | None = None
) -> str:
    """``predicted billing (0.91) · label repair: wrong`` for titles and status lines."""
    if predicted is None or not len(probabilities):
        return "no classifier head: nothing predicted"
    name = labels[predicted] if predicted < len(labels) else str(predicted)
    text = f"predicted {name} ({float(probabilities[predicted]):.2f})"
    if gold is not None:
        text += f" · label {gold}: {'right' if gold == name else 'wrong'}"
    return text


def evidence_into(
    fig: Figure,
    tokens: Sequence[str],
    row_labels: Sequence[str],
    values: np.ndarray,
    agreement: Sequence[float | str | None] | None = None,
    *,
    labels: Sequence[str] = (),
    probabilities: np.ndarray | None = None,
    predicted: int | None = None,
    gold: str | None = None,
    title: str | None = None,
) -> EvidenceArtists:
    """Clear ``fig`` and lay out the strip, its colour bar and the class probabilities."""
    fig.clear()
    ax = fig.add_axes((0.2, 0.3, 0.5, 0.6))
    cax = fig.add_axes((0.75, 0.3, 0.02, 0.6))
    has_classes = probabilities is not None and len(probabilities) > 0
    pax = fig.add_axes((0.82, 0.3, 0.15, 0.6)) if has_classes else None
    left = text_width_in(max((len(k) for k in row_labels), default=4)) + 0.15
    bottom = text_width_in(max((len(style.token_label(t)) for t in tokens), default=1)) + 0.15
    top = line_height_in(style.TITLE_SIZE, 1.7) if title else 0.15
    label_width = text_width_in(max((len(str(s)) + 2 for s in labels), default=4))
    classes_width = (label_width + 1.05) if has_classes else 0.0

    drawn: list[EvidenceArtists] = []

    def place(width: float, height: float) -> dict[Axes, Box]:
        rho, bar, bar_label = 0.72, 0.11, 0.8
        strip_w = width - left - rho - bar - bar_label - 0.1
        h = max(height - bottom - top, 0.1)
        for artists in drawn:
            artists.thin_rows(h * fig.dpi)
        show_classes = pax is not None and strip_w - classes_width >= max(2.5, 0.45 * width)
        if show_classes:
            strip_w -= classes_width
        boxes: dict[Axes, Box] = {ax: (left, bottom, strip_w, h)}
        x = left + max(strip_w, 0.05) + rho
        boxes[cax] = (x, bottom, bar, h)
        if pax is not None:
            # Too narrow for the bars: the title already states the prediction.
            pax.set_visible(show_classes)
            x += bar + bar_label + label_width + 0.1
            ph = min(h, 0.28 * len(probabilities) + 0.1)
            boxes[pax] = (x, bottom + h - ph, 0.85, ph)
        return boxes

    fig.set_layout_engine(InchLayout(place))
    artists = draw_evidence_strip(ax, tokens, row_labels, values, agreement, cax=cax, title=title)
    drawn.append(artists)
    if pax is not None:
        draw_class_probabilities(pax, labels, probabilities, predicted, gold)
    return artists


def recording_evidence_into(fig: Figure, rec, evidence, gold: str | None = None) -> EvidenceArtists:
    """The strip of ``evidence`` (``viewer.reports.evidence.Evidence``) for its recording ``rec``,
    with the class probabilities, the predicted class and the ``gold`` label, titled with the
    prediction line: what the evidence pane shows and its export draws."""
    probs = rec.class_probabilities()
    row_labels, values, agreement = evidence.strip_rows()
    artists = evidence_into(
        fig,
        rec.tokens,
        row_labels,
        values,
        agreement,
        labels=rec.labels,
        probabilities=probs if len(probs) else None,
        predicted=rec.predicted(),
        gold=gold,
        title=prediction_line(rec.labels, probs, rec.predicted(), gold),
    )
    span = getattr(evidence, "span", None)
    if span is not None:
        mark_span(artists, span.first, span.last)
    return artists


def mark_span(artists: EvidenceArtists, first: int, last: int) -> Rectangle:
    """A dashed outline around tokens ``first``..``last`` on every row: the span knocked out
    together (its drop is in the title of the pane and in the command's output)."""
    box = Rectangle(
        (first - 0.5, -0.5),
        last - first + 1,
        len(artists.row_labels),
        fill=False,
        edgecolor=style.ACCENT,
        linewidth=1.6,
        linestyle="--",
        zorder=4,
    )
    artists.ax.add_patch(box)
    return box
