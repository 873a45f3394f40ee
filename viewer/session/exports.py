"""Pane exports as plain builders: a print-size figure, the pane's numbers, a file-name stem.

``pair_grid_export``, ``head_map_export``, ``links_export``, ``link_accuracy_export`` and
``evidence_export`` take plain arguments (the analysis, the layer and head, the model's name
…), never the selection state, and return a ``PaneExport``: a fresh figure drawn by the *same*
builder of ``viewer.figures`` the pane uses, headed by the model, the text, the layer/head and
the metric, plus the numbers as a JSON dictionary and a CSV table. ``write_export`` writes the
five files (``viewer.figures.export``: atomic, PNG at 300 dpi, SVG, PDF, CSV, JSON). The Qt
half (menus, file dialogs, the clipboard) is ``viewer.gui.export``. ``export_card`` writes the
card folder: the reports' numbers and words, the figures' drawings, put into one folder.

numpy and matplotlib are imported inside the builders: the window appears before they load.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

from viewer.errors import HeadlightError
from viewer.files import sanitise_name

if TYPE_CHECKING:
    from viewer.model.loader import LoadedModel
    from viewer.reports.shards import RunOptions
    from viewer.reports.textsets import TextSource

DATA_FORMATS = ("json", "csv")
TEXT_CHARS = 70  # the text in an export's heading is shortened to this many characters
HEADING_SIZE = 9.0


@dataclass
class PaneExport:
    """One pane's export: a print-size figure, its data, and a default file-name stem."""

    figure: Any  # matplotlib Figure
    data: dict
    header: list[str]
    rows: list[list[Any]]
    stem: str  # default file-name stem (no folder, no suffix)
    heading: tuple[str, ...] = field(default_factory=tuple)


@dataclass(frozen=True)
class Source:
    """Which model an export comes from (name shown in the heading, folder in the data)."""

    name: str
    folder: str | None = None


# -- helpers ----------------------------------------------------------------------------------------


def shorten(text: str, max_chars: int = TEXT_CHARS) -> str:
    """One line of at most ``max_chars`` characters, an ellipsis where it was cut."""
    flat = " ".join(str(text).split())
    return flat if len(flat) <= max_chars else flat[: max_chars - 1].rstrip() + "…"


def plain(value: Any) -> Any:
    """numpy values and arrays as JSON-ready Python values (NaN and ±inf become None)."""
    import numpy as np

    if isinstance(value, np.ndarray):
        return [plain(v) for v in value.tolist()] if value.ndim else plain(value.item())
    if isinstance(value, (list, tuple)):
        return [plain(v) for v in value]
    if isinstance(value, dict):
        return {str(k): plain(v) for k, v in value.items()}
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value


def _cell(value: Any) -> Any:
    """A CSV cell: NaN as an empty cell, numpy scalars as Python numbers."""
    value = plain(value)
    return "" if value is None else value


def export_stem(text: str, pane: str) -> str:
    """``<sanitised text>-<pane>``, e.g. ``the-mechanic-trued-the-wheel-pair-grid``."""
    return f"{sanitise_name(text)}-{sanitise_name(pane, fallback='pane')}"


def print_figure():
    """A fresh figure at print size (the exported figure is never the pane's own)."""
    from matplotlib.figure import Figure

    from viewer.figures.export import PRINT_SIZE

    return Figure(figsize=PRINT_SIZE, dpi=100)


def add_heading(fig, lines: tuple[str, ...]) -> None:
    """Write ``lines`` above the builder's layout, which is moved down to make room.

    The builders lay their axes out with ``InchLayout`` from the figure's size; asking the same
    placer for a figure that is shorter by the heading's height leaves a free strip on top.
    """
    from viewer.figures.layout import InchLayout, line_height_in

    if not lines:
        return
    extra = line_height_in(HEADING_SIZE, len(lines) + 0.5)
    engine = fig.get_layout_engine()
    placer = getattr(engine, "placer", None)
    if placer is not None:
        fig.set_layout_engine(InchLayout(lambda w, h: placer(w, max(h - extra, 0.5))))
    width, height = fig.get_size_inches()
    fig.text(
        0.12 / width,
        1 - 0.08 / height,
        "\n".join(lines),
        ha="left",
        va="top",
        fontsize=HEADING_SIZE,
        color="#1d2b36",
        linespacing=1.3,
    )


def _heading(model: str, pane: str, where: str, metric: str, text: str) -> tuple[str, ...]:
    return (f"{model} · {pane} · {where} · {metric}", f"text: “{shorten(text)}”")


def _base_data(pane: str, source: Source, text: str) -> dict:
    return {
        "pane": pane,
        "model": source.name,
        "model_folder": source.folder,
        "text": text,
        "layers_and_heads_count_from": 0,
    }


# -- builders ---------------------------------------------------------------------------------------


def pair_grid_export(
    analysis,
    source: Source,
    *,
    layer: int,
    head: int | None,
    query: int | None = None,
    key: int | None = None,
    pane: str = "pair grid",
    block: str = "max",
) -> PaneExport:
    """One head's (or the head mean's) attention as the pair grid draws it; ``query``/``key``
    mark the selected cell. A long text is exported as the pane draws it: its overview, the
    ``block`` max or mean (``overview_export``)."""
    import numpy as np

    from viewer.figures.pair_grid import mark_cell, pair_grid_into, visible_cells
    from viewer.figures.style import ATTENTION_UNITS, head_name

    if analysis is None:
        raise HeadlightError(f"nothing to export in the {pane} yet: run a text first")
    rec = analysis.recording
    layer = min(layer, rec.n_layers - 1)
    head = head if head is None else min(head, rec.n_heads - 1)
    if not analysis.dense:
        return overview_export(
            analysis, source, layer=layer, head=head, block=block, query=query, key=key, pane=pane
        )
    grid = np.asarray(analysis.grid(layer, head))
    visible = visible_cells(rec, layer)
    where = head_name(layer, head)
    fig = print_figure()
    arts = pair_grid_into(fig, grid, rec.tokens, visible=visible, title=f"{where} · {ATTENTION_UNITS}")
    if query is not None and query < rec.n_tokens:
        mark_cell(arts, query, key if key is not None and key < rec.n_tokens else None)
    heading = _heading(source.name, pane, where, ATTENTION_UNITS, rec.text)
    add_heading(fig, heading)
    data = _base_data(pane, source, rec.text)
    data.update(
        {
            "layer": layer,
            "head": head,
            "metric": ATTENTION_UNITS,
            "units": ATTENTION_UNITS,
            "rows": "query tokens",
            "columns": "key tokens",
            "tokens": list(rec.tokens),
            "causal": bool(rec.causal),
            "values": plain(grid.astype(np.float64)),
            "visible": None if visible is None else plain(np.asarray(visible, bool)),
        }
    )
    rows = [
        [
            i,
            rec.tokens[i],
            j,
            rec.tokens[j],
            float(grid[i, j]),
            bool(visible[i, j]) if visible is not None else True,
        ]
        for i in range(grid.shape[0])
        for j in range(grid.shape[1])
    ]
    header = ["query", "query_token", "key", "key_token", "attention_probability", "visible"]
    return PaneExport(fig, data, header, rows, export_stem(rec.text, pane), heading)


def overview_export(
    analysis,
    source: Source,
    *,
    layer: int,
    head: int | None,
    block: str,
    query: int | None = None,
    key: int | None = None,
    pane: str = "pair grid",
) -> PaneExport:
    """A long text's pair grid as its overview (``viewer.core.overview``): one value per block
    of c × c tokens, the block max or block mean, NaN (empty in the CSV) for a block with no
    visible cell. The overview must have been computed (the pane computes it when shown)."""
    import numpy as np

    from viewer.figures.pair_grid import mark_cell, pair_grid_into
    from viewer.figures.style import head_name
    from viewer.session.pair_view import block_values, overview_label, overview_units

    rec = analysis.recording
    where = head_name(layer, head)
    overview = analysis.cached_overview(layer, head)
    if overview is None:
        raise HeadlightError(
            f"the overview of {where} is still being computed; export it once the pane shows it"
        )
    values = block_values(overview, block)
    shown = np.isfinite(values)
    what = overview_label(overview, block)
    units = overview_units(block)
    fig = print_figure()
    arts = pair_grid_into(
        fig,
        values,
        rec.tokens,
        visible=None if shown.all() else shown,
        title=f"{where} · {what}",
        units=units,
        block=overview.size,
        numbered=True,
    )
    if query is not None and query < rec.n_tokens:
        mark_cell(arts, query, key if key is not None and key < rec.n_tokens else None)
    heading = _heading(source.name, pane, where, what, rec.text)
    add_heading(fig, heading)
    edges = overview.edges()  # (n + 1,) token boundaries of the blocks
    data = _base_data(pane, source, rec.text)
    data.update(
        {
            "layer": layer,
            "head": head,
            "metric": units,
            "units": units,
            "overview": {"block": int(overview.size), "pooling": block, "tokens": rec.n_tokens},
            "block_edges": plain(edges),
            "rows": "blocks of query tokens",
            "columns": "blocks of key tokens",
            "causal": bool(rec.causal),
            "values": plain(values.astype(np.float64)),
        }
    )
    n = values.shape[0]
    rows = [
        [int(edges[i]), int(edges[i + 1]) - 1, int(edges[j]), int(edges[j + 1]) - 1, _cell(values[i, j])]
        for i in range(n)
        for j in range(n)
    ]
    header = ["query_first", "query_last", "key_first", "key_last", f"block_{block}"]
    return PaneExport(fig, data, header, rows, export_stem(rec.text, pane), heading)


def head_map_export(
    values,
    source: Source,
    *,
    metric: str,
    text: str,
    layer: int,
    head: int | None,
    scope: str = "text",
    text_set: tuple[str, int] | None = None,
) -> PaneExport:
    """The head map: exactly the (L, H) ``HeadValues`` the pane shows (``viewer.session.metrics``).

    ``text_set`` is (file, number of texts) when the values summarise a text set.
    """
    import numpy as np

    from viewer.figures.export import grid_rows
    from viewer.figures.head_map import head_map_into
    from viewer.figures.style import head_name

    title = values.title
    fig = print_figure()
    head_map_into(
        fig,
        values.values,
        label=values.label,
        diverging=values.diverging,
        selected=(layer, head),
        title=f"head map · {title}",
    )
    if text_set is not None:
        path, n = text_set
        heading = (
            f"{source.name} · head map · selected {head_name(layer, head)} · {values.label}",
            f"text set: {Path(path).name} ({n} texts)",
        )
    else:
        heading = _heading(source.name, "head map", f"selected {head_name(layer, head)}", values.label, text)
    add_heading(fig, heading)
    data = _base_data("head map", source, text)
    data.update(
        {
            "metric": metric,
            "title": title,
            "units": values.label,
            "diverging": bool(values.diverging),
            "scope": scope,
            "selected": {"layer": layer, "head": head},
            "values": plain(np.asarray(values.values, dtype=np.float64)),
        }
    )
    rows = [[la, h, _cell(v)] for la, h, v in grid_rows(values.values)]
    return PaneExport(fig, data, ["layer", "head", metric], rows, export_stem(text, "head map"), heading)


def link_accuracy_export(run, source: Source, *, layer: int, head: int | None, text: str = "") -> PaneExport:
    """Per-head accuracy over a link-pairs file (``LinkPairsRun``) with the nearest baseline."""
    from viewer.figures.export import grid_rows
    from viewer.figures.links import accuracy_into

    report = run.report
    fig = print_figure()
    accuracy_into(
        fig,
        report.accuracy,
        nearest_baseline=report.nearest_baseline,
        pairs=report.pairs,
        selected=(layer, head),
    )
    best_layer, best_head, best = report.best()
    heading = (
        f"{source.name} · links · link accuracy per head · best layer {best_layer} · "
        f"head {best_head} ({best:.2f})",
        f"link pairs: {Path(run.path).name} ({report.pairs} pairs)",
    )
    add_heading(fig, heading)
    data = _base_data("links", source, text)
    data.update(
        {
            "view": "link-pairs file",
            "pairs_file": run.path,
            **report.to_dict(),
            "metric": "link accuracy",
            "units": "share of pairs right",
        }
    )
    rows = [[la, h, _cell(v)] for la, h, v in grid_rows(report.accuracy)]
    stem = f"{sanitise_name(Path(run.path).stem)}-link-accuracy"
    return PaneExport(fig, data, ["layer", "head", "link_accuracy"], rows, stem, heading)


def links_export(
    analysis, source: Source, *, layer: int, head: int | None, query: int | None, key: int | None
) -> PaneExport:
    """Link scores from the query token's word: bars per word and, with a key token, the
    per-head score to its word."""
    import numpy as np

    from viewer.figures.links import LINK_UNITS, links_into
    from viewer.figures.style import head_name
    from viewer.session.views import link_view

    if analysis is None:
        raise HeadlightError("nothing to export in the links pane yet: run a text first")
    rec = analysis.recording
    if query is None or query >= rec.n_tokens:
        raise HeadlightError(
            "nothing to export in the links pane: pick a source token first (click a pair-grid cell)"
        )
    u = analysis.units
    view = link_view(analysis, layer, head, query, key)
    scores, per_head, target_unit = view.scores, view.per_head, view.target_unit
    source_name, target_name = view.source_name, view.target_name
    where = head_name(layer, head)
    fig = print_figure()
    links_into(
        fig,
        u.names,
        scores,
        per_head_to_target=per_head,
        target=target_unit,
        source_name=source_name,
        target_name=target_name,
        head_title=where,
        selected=(layer, head),
        exclude=None,
    )
    pair = f"'{source_name}'" + (f" → '{target_name}'" if target_name else "")
    heading = _heading(source.name, f"links from {pair}", where, LINK_UNITS, rec.text)
    add_heading(fig, heading)
    data = _base_data("links", source, rec.text)
    data.update(
        {
            "view": "this text",
            "metric": "link score",
            "units": LINK_UNITS,
            "layer": layer,
            "head": head,
            "source": {"token": query, "word": source_name},
            "target": None if target_name is None else {"token": key, "word": target_name},
            "words": list(u.names),
            "word_tokens": [plain(np.asarray(idx)) for idx in u.tokens],
            "scores": plain(scores),
            "per_head_to_target": None if per_head is None else plain(np.asarray(per_head, dtype=np.float64)),
        }
    )
    rows = [[k, name, _cell(v)] for k, (name, v) in enumerate(zip(u.names, scores, strict=True))]
    return PaneExport(
        fig, data, ["word_index", "word", "link_score"], rows, export_stem(rec.text, "links"), heading
    )


def evidence_export(analysis, evidence, source: Source, *, token: int | None = None) -> PaneExport:
    """The evidence strip; its data holds the keys of ``headlight evidence --json``."""

    from viewer.figures.evidence import ROW_UNITS, mark_token, prediction_line, recording_evidence_into

    if analysis is None:
        raise HeadlightError("nothing to export in the evidence strip yet: run a text first")
    if evidence is None:
        raise HeadlightError("the evidence for this text is not computed yet (Run → Compute evidence)")
    rec = analysis.recording
    probs = rec.class_probabilities()
    line = prediction_line(rec.labels, probs, rec.predicted(), analysis.label)
    row_labels, values, _ = evidence.strip_rows()
    fig = print_figure()
    arts = recording_evidence_into(fig, rec, evidence, gold=analysis.label)
    mark_token(arts, token)
    units = " ".join(ROW_UNITS.split())
    heading = _heading(
        source.name,
        "evidence strip",
        "all layers and heads",
        f"{len(row_labels)} rows, colours: {units}",
        rec.text,
    )
    add_heading(fig, heading)
    data = _base_data("evidence strip", source, rec.text)
    data.update(evidence.to_dict())
    data.update(
        {
            "prediction": line,
            "gold": analysis.label,
            "strip_rows": list(row_labels),
            "figure_colours": units + " (each row divided by its largest |value|)",
        }
    )
    rows = [
        [i, tok, *(_cell(values[k, i]) for k in range(len(row_labels)))] for i, tok in enumerate(rec.tokens)
    ]
    return PaneExport(
        fig,
        data,
        ["token", "token_text", *row_labels],
        rows,
        export_stem(rec.text, "evidence strip"),
        heading,
    )


def fixation_export(
    report, source: Source, *, head: int | None = None, word: str | None = None, text_set: str | None = None
) -> PaneExport:
    """The fixation plot of a shortcut report: every ranked word's attention share (last
    layer, head mean or ``head``) against its knockout effect, as the pane draws it."""
    from viewer.figures.fixation import X_UNITS, fixation_into

    if report is None:
        raise HeadlightError(
            "nothing to export in the fixation plot yet: search a text set for shortcuts first"
        )
    rows, focus = report.fixation(head)
    where = "head mean" if head is None else f"head {head}"
    fig = print_figure()
    fixation_into(
        fig,
        [r["token"] for r in rows],
        focus,
        [r["mean_drop"] for r in rows],
        [r["count"] for r in rows],
        highlight=word,
        x_units=f"{X_UNITS}, {where}",
        title=f"fixation plot · {len(rows)} words · last layer, {where}",
    )
    name = Path(text_set).name if text_set else "text set"
    heading = (f"{source.name} · fixation plot · {where}", f"text set: {name} ({report.texts} texts)")
    add_heading(fig, heading)
    data = _base_data("fixation plot", source, "")
    data.update(
        {
            "text_set": text_set,
            "texts": report.texts,
            "head": head,
            "x": f"{X_UNITS}, {where}",
            "y": "mean drop in p(predicted) on knockout",
            "words": [{**r, "attention_share": float(f)} for r, f in zip(rows, focus, strict=True)],
        }
    )
    table = [
        [r["token"], r["count"], _cell(f), _cell(r["mean_drop"]), _cell(r["flip_rate"]), _cell(r["flip_low"])]
        for r, f in zip(rows, focus, strict=True)
    ]
    header = ["word", "count", "attention_share", "mean_drop", "flip_rate", "flip_low"]
    stem = f"{sanitise_name(Path(text_set).stem if text_set else 'text-set')}-fixation-plot"
    return PaneExport(fig, data, header, table, stem, heading)


# -- files ------------------------------------------------------------------------------------------


def export_paths(stem: str | Path) -> list[Path]:
    """The five files an export writes for ``stem``."""
    from viewer.figures.export import FIGURE_FORMATS

    stem = Path(stem)
    return [stem.with_suffix(f".{fmt}") for fmt in (*FIGURE_FORMATS, *DATA_FORMATS)]


def write_export(export: PaneExport, stem: str | Path, *, force: bool = False) -> list[Path]:
    """Write the figure (PNG 300 dpi, SVG, PDF) and the data (JSON, CSV) next to ``stem``."""
    from viewer.figures.export import save_data, save_figure

    written = save_figure(export.figure, stem, force=force)
    written += save_data(stem, export.data, export.header, export.rows, force=force)
    return written


# -- the card export --------------------------------------------------------------------------------

CARD_FORMATS = ("png", "svg")


def export_card(
    loaded: LoadedModel,
    texts: str | Path | TextSource,
    out: str | Path,
    *,
    pairs_path: str | Path | None = None,
    force: bool = False,
    command: Sequence[str] = (),
    batch_size: int = 16,
    quiet: bool = False,
    date: str | None = None,
    run: RunOptions | None = None,
) -> Path:
    """Write the card folder at ``out``: ``card.md``, ``card.json`` and ``figures/`` (PNG and
    SVG), refusing to replace an existing folder without ``force``.

    The numbers and words are the reports' (``viewer.reports.card``), the figures are drawn by
    ``viewer.figures.card``; the folder is built under a temporary name and moved into place
    in one rename (``viewer.files.StagedFolder``). Apart from its one ``date`` line, an export
    is reproducible byte for byte.
    """
    import os
    import tempfile

    from viewer.figures.card import card_figures
    from viewer.figures.export import save_figure
    from viewer.files import StagedFolder, atomic_write_text, json_text
    from viewer.reports.card import CAUTIONS, card_data, card_markdown, reproducibility
    from viewer.reports.shards import SERIAL
    from viewer.reports.textsets import as_source

    source = as_source(texts)
    pairs_path = Path(pairs_path) if pairs_path is not None else None
    out = Path(out)
    if out.exists() and not force:
        raise HeadlightError(f"{out} already exists; pass --force to replace it")
    parent = out.parent if str(out.parent) else Path(".")
    if not parent.is_dir():  # fail before the (long) computation, not after it
        raise HeadlightError(f"cannot write {out}: folder {parent} does not exist")
    try:  # the folder's mode does not say it all (root, read-only mounts): try it
        os.rmdir(tempfile.mkdtemp(prefix=f".{out.name}.probe.", dir=parent))
    except OSError as exc:
        raise HeadlightError(f"cannot write {out}: {exc.strerror or type(exc).__name__}") from None
    data = card_data(
        loaded, source, pairs_path, batch_size=batch_size, quiet=quiet, run=SERIAL if run is None else run
    )
    data["reproducibility"] = reproducibility(loaded, source, pairs_path, command, date)
    data["cautions"] = list(CAUTIONS)
    with StagedFolder(out, force=force) as tmp:
        (tmp / "figures").mkdir()
        figures = {}
        for name, fig in card_figures(data).items():
            save_figure(fig, tmp / "figures" / name, CARD_FORMATS)
            figures[name] = f"figures/{name}.png"
        data["figures"] = figures
        atomic_write_text(tmp / "card.md", card_markdown(data, figures))
        atomic_write_text(tmp / "card.json", json_text(data))
    return out
