"""Exporting what a pane shows: figure files, data files, the clipboard, and the card folder.

Two halves:

* **Pure builders** (no Qt, only matplotlib and numpy): ``pair_grid_export``,
  ``head_map_export``, ``links_export`` and ``evidence_export`` take the selection state (and the
  recording it points to) and return a ``PaneExport``: a fresh print-size figure drawn by the
  *same* builder of ``viewer.figures`` the pane uses, headed by the model, the text, the
  layer/head and the metric, plus the pane's numbers as a JSON dictionary and a CSV table.
  ``build_export(pane)`` picks the right one for a pane of the window.
* **Thin Qt actions**: ``PaneExporter`` adds File → Export pane ▸ …, the canvases' right-click
  menus, "Copy figure", and File → Export model-card folder… (run on the worker with the
  window's open model through ``card_job``).

Files are written by ``viewer.figures.export`` (atomic, PNG at 300 dpi, SVG, PDF, CSV, JSON).
An existing file is only replaced after ``confirm_overwrite`` said yes; tests patch that function.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from PySide6.QtCore import QEvent, QObject, QPoint, Qt
from PySide6.QtGui import QImage
from PySide6.QtWidgets import (
    QApplication,
    QDialog,
    QDialogButtonBox,
    QFileDialog,
    QFormLayout,
    QHBoxLayout,
    QLineEdit,
    QMenu,
    QMessageBox,
    QPushButton,
    QWidget,
)

from viewer.errors import HeadlightError
from viewer.files import sanitise_name

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


# -- helpers (pure) ---------------------------------------------------------------------------------


def shorten(text: str, max_chars: int = TEXT_CHARS) -> str:
    """One line of at most ``max_chars`` characters, an ellipsis where it was cut."""
    flat = " ".join(str(text).split())
    return flat if len(flat) <= max_chars else flat[: max_chars - 1].rstrip() + "…"


def plain(value: Any) -> Any:
    """numpy values and arrays as JSON-ready Python values (NaN and ±inf become None)."""
    import numpy as np  # not at import time: the window appears before numpy loads

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
    fig.text(0.12 / width, 1 - 0.08 / height, "\n".join(lines), ha="left", va="top",
             fontsize=HEADING_SIZE, color="#1d2b36", linespacing=1.3)


def _model_name(state, recording=None) -> str:
    if state.model is not None:
        return state.model.name
    return getattr(recording, "model_name", "") or "model"


def _heading(model: str, pane: str, where: str, metric: str, text: str) -> tuple[str, ...]:
    return (f"{model} · {pane} · {where} · {metric}", f"text: “{shorten(text)}”")


def _base_data(pane: str, model: str, text: str, state) -> dict:
    return {"pane": pane, "model": model, "model_folder": getattr(state.model, "folder", None),
            "text": text, "layers_and_heads_count_from": 0}


# -- pure builders ----------------------------------------------------------------------------------


def pair_grid_export(state, analysis, *, pane: str = "pair grid") -> PaneExport:
    """The selected head's (or head mean's) attention as the pair grid draws it."""
    import numpy as np  # not at import time: the window appears before numpy loads

    from viewer.figures.pair_grid import mark_cell, pair_grid_into
    from viewer.figures.style import ATTENTION_UNITS, head_name

    if analysis is None:
        raise HeadlightError(f"nothing to export in the {pane} yet: run a text first")
    rec = analysis.recording
    layer = min(state.layer, rec.n_layers - 1)
    head = state.head if state.head is None else min(state.head, rec.n_heads - 1)
    grid = np.asarray(analysis.grid(layer, head))
    visible = rec.key_mask() if rec.causal else None
    model = _model_name(state, rec)
    where = head_name(layer, head)
    fig = print_figure()
    arts = pair_grid_into(fig, grid, rec.tokens, visible=visible,
                          title=f"{where} · {ATTENTION_UNITS}")
    s, t = state.source, state.target
    if pane == "pair grid" and s is not None and s < rec.n_tokens:
        mark_cell(arts, s, t if t is not None and t < rec.n_tokens else None)
    heading = _heading(model, pane, where, ATTENTION_UNITS, rec.text)
    add_heading(fig, heading)
    data = _base_data(pane, model, rec.text, state)
    data.update({
        "layer": layer, "head": head, "metric": ATTENTION_UNITS, "units": ATTENTION_UNITS,
        "rows": "query tokens", "columns": "key tokens",
        "tokens": list(rec.tokens), "causal": bool(rec.causal),
        "values": plain(grid.astype(np.float64)),
        "visible": None if visible is None else plain(np.asarray(visible, bool)),
    })
    rows = [[i, rec.tokens[i], j, rec.tokens[j], float(grid[i, j]),
             bool(visible[i, j]) if visible is not None else True]
            for i in range(grid.shape[0]) for j in range(grid.shape[1])]
    header = ["query", "query_token", "key", "key_token", "attention_probability", "visible"]
    return PaneExport(fig, data, header, rows, export_stem(rec.text, pane), heading)


def head_map_export(state) -> PaneExport:
    """The head map's metric, exactly the (L, H) values the pane shows."""
    import numpy as np  # not at import time: the window appears before numpy loads

    from viewer.figures.export import grid_rows
    from viewer.figures.head_map import head_map_into
    from viewer.figures.style import head_name
    from viewer.gui.metrics import head_values

    result = head_values(state)
    if isinstance(result, str):
        raise HeadlightError(f"nothing to export in the head map: {result}")
    a = state.analysis
    text = a.recording.text if a is not None else state.text
    model = _model_name(state, a.recording if a is not None else None)
    metric = result.title
    fig = print_figure()
    head_map_into(fig, result.values, label=result.label, diverging=result.diverging,
                  selected=(state.layer, state.head), title=f"head map · {metric}")
    if state.scope == "set" and state.textset is not None and "text set" in metric:
        source = f"text set: {Path(state.textset.path).name} ({len(state.textset.rows)} texts)"
        heading = (f"{model} · head map · selected {head_name(state.layer, state.head)} · "
                   f"{result.label}", source)
    else:
        heading = _heading(model, "head map", f"selected {head_name(state.layer, state.head)}",
                           result.label, text)
    add_heading(fig, heading)
    data = _base_data("head map", model, text, state)
    data.update({"metric": state.metric, "title": metric, "units": result.label,
                 "diverging": bool(result.diverging), "scope": state.scope,
                 "selected": {"layer": state.layer, "head": state.head},
                 "values": plain(np.asarray(result.values, dtype=np.float64))})
    rows = [[layer, head, _cell(v)] for layer, head, v in grid_rows(result.values)]
    return PaneExport(fig, data, ["layer", "head", state.metric], rows,
                      export_stem(text, "head map"), heading)


def links_export(state, *, view: str = "text") -> PaneExport:
    """Link scores from the source word (bars + per-head map), or link-pairs accuracy."""
    import numpy as np  # not at import time: the window appears before numpy loads

    from viewer.figures.export import grid_rows
    from viewer.figures.links import LINK_UNITS, accuracy_into, links_into
    from viewer.figures.style import head_name
    from viewer.gui.analysis import per_head_link, unit_links

    a = state.analysis
    pairs = state.link_pairs
    model = _model_name(state, a.recording if a is not None else None)
    if view == "file" and pairs is not None:
        fig = print_figure()
        accuracy_into(fig, pairs.accuracy, nearest_baseline=pairs.nearest_baseline,
                      pairs=pairs.pairs, selected=(state.layer, state.head))
        layer, head, best = pairs.best
        heading = (f"{model} · links · link accuracy per head · best layer {layer} · "
                   f"head {head} ({best:.2f})",
                   f"link pairs: {Path(pairs.path).name} ({pairs.pairs} pairs)")
        add_heading(fig, heading)
        data = _base_data("links", model, state.text, state)
        data.update({"view": "link-pairs file", "pairs_file": pairs.path, "pairs": pairs.pairs,
                     "metric": "link accuracy", "units": "share of pairs right",
                     "accuracy": plain(np.asarray(pairs.accuracy, dtype=np.float64)),
                     "nearest_baseline": float(pairs.nearest_baseline),
                     "best": {"layer": int(layer), "head": int(head), "accuracy": float(best)}})
        rows = [[la, h, _cell(v)] for la, h, v in grid_rows(pairs.accuracy)]
        stem = f"{sanitise_name(Path(pairs.path).stem)}-link-accuracy"
        return PaneExport(fig, data, ["layer", "head", "link_accuracy"], rows, stem, heading)
    if a is None:
        raise HeadlightError("nothing to export in the links pane yet: run a text first")
    rec = a.recording
    s, t = state.source, state.target
    if s is None or s >= rec.n_tokens:
        raise HeadlightError("nothing to export in the links pane: pick a source token first "
                             "(click a pair-grid cell)")
    layer, head = state.layer, state.head
    u = a.units
    scores = unit_links(a, layer, head, s)
    per_head = target_unit = None
    if t is not None and t < rec.n_tokens:
        per_head = per_head_link(a, s, t)
        target_unit = u.unit_of(t)
    source_name = u.names[u.unit_of(s)]
    target_name = u.names[target_unit] if target_unit is not None else None
    where = head_name(layer, head)
    fig = print_figure()
    links_into(fig, u.names, scores, per_head_to_target=per_head, target=target_unit,
               source_name=source_name, target_name=target_name, head_title=where,
               selected=(layer, head), exclude=None)
    pair = f"'{source_name}'" + (f" → '{target_name}'" if target_name else "")
    heading = _heading(model, f"links from {pair}", where, LINK_UNITS, rec.text)
    add_heading(fig, heading)
    data = _base_data("links", model, rec.text, state)
    data.update({"view": "this text", "metric": "link score", "units": LINK_UNITS,
                 "layer": layer, "head": head, "source": {"token": s, "word": source_name},
                 "target": None if target_name is None else {"token": t, "word": target_name},
                 "words": list(u.names),
                 "word_tokens": [plain(np.asarray(idx)) for idx in u.tokens],
                 "scores": plain(scores),
                 "per_head_to_target": None if per_head is None else plain(
                     np.asarray(per_head, dtype=np.float64))})
    rows = [[k, name, _cell(v)] for k, (name, v) in enumerate(zip(u.names, scores, strict=True))]
    return PaneExport(fig, data, ["word_index", "word", "link_score"], rows,
                      export_stem(rec.text, "links"), heading)


def evidence_export(state) -> PaneExport:
    """The evidence strip: every kind of per-token evidence, with the class probabilities."""
    import numpy as np  # not at import time: the window appears before numpy loads

    from viewer.figures.evidence import ROW_UNITS, evidence_into, mark_token, prediction_line

    a = state.analysis
    ev = state.evidence
    if a is None:
        raise HeadlightError("nothing to export in the evidence strip yet: run a text first")
    if ev is None:
        raise HeadlightError("the evidence for this text is not computed yet (Run → Compute "
                             "evidence)")
    rec = a.recording
    probs = rec.class_probabilities()
    line = prediction_line(rec.labels, probs, rec.predicted(), a.label)
    model = _model_name(state, rec)
    fig = print_figure()
    arts = evidence_into(fig, rec.tokens, ev.kinds, ev.values, ev.agreement, labels=rec.labels,
                         probabilities=probs if len(probs) else None,
                         predicted=rec.predicted(), gold=a.label, title=line)
    mark_token(arts, state.source)
    units = " ".join(ROW_UNITS.split())
    heading = _heading(model, "evidence strip", "all layers and heads",
                       f"{len(ev.kinds)} kinds, colours: {units}", rec.text)
    add_heading(fig, heading)
    values = np.asarray(ev.values, dtype=np.float64)
    data = _base_data("evidence strip", model, rec.text, state)
    data.update({"prediction": line, "labels": list(rec.labels),
                 "probabilities": plain(np.asarray(probs, dtype=np.float64)),
                 "predicted": rec.predicted(), "gold": a.label, "tokens": list(rec.tokens),
                 "kinds": list(ev.kinds), "values": plain(values),
                 "agreement_with_knockout": plain(list(ev.agreement)),
                 "figure_colours": units + " (each row divided by its largest |value|)"})
    rows = [[i, tok, *(_cell(values[k, i]) for k in range(len(ev.kinds)))]
            for i, tok in enumerate(rec.tokens)]
    return PaneExport(fig, data, ["token", "token_text", *ev.kinds], rows,
                      export_stem(rec.text, "evidence strip"), heading)


def build_export(pane) -> PaneExport:
    """The export of one of the window's figure panes (dispatch on the pane's class)."""
    from viewer.gui.panes.evidence import EvidencePane
    from viewer.gui.panes.head_map import HeadMapPane
    from viewer.gui.panes.links import LinksPane
    from viewer.gui.panes.pair_grid import PairGridPane

    state = pane.state
    if isinstance(pane, PairGridPane):
        name = "compare grid" if pane.slot == "compare" else "pair grid"
        return pair_grid_export(state, pane.analysis, pane=name)
    if isinstance(pane, HeadMapPane):
        return head_map_export(state)
    if isinstance(pane, LinksPane):
        return links_export(state, view=pane.view_box.currentData() or "text")
    if isinstance(pane, EvidencePane):
        return evidence_export(state)
    raise HeadlightError(f"the {pane.title} pane has no export")


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


def card_command(folder: str, texts: str, pairs: str | None, out: str,
                 force: bool) -> tuple[str, ...]:
    """The ``headlight card`` command that writes the same folder as the window's export."""
    cmd = ["headlight", "card", folder, "--texts", texts]
    if pairs:
        cmd += ["--pairs", pairs]
    cmd += ["--out", out]
    if force:
        cmd.append("--force")
    return tuple(cmd)


def card_job(ctx, slot: str, texts: str, pairs: str | None, out: str, force: bool) -> str:
    """Worker job: ``export_card`` with the window's open model (worker thread, no Qt)."""
    loaded = ctx.model(slot)
    ctx.progress(0, 0, "writing the model-card folder (check, heads, links, shortcuts)…")
    from viewer.figures.card import export_card

    command = card_command(str(loaded.folder), texts, pairs, out, force)
    path = export_card(loaded, texts, out, pairs_path=pairs, force=force, command=command,
                       quiet=True)
    return str(path)


# -- Qt ---------------------------------------------------------------------------------------------


def confirm_overwrite(parent: QWidget | None, paths: list[Path]) -> bool:
    """Ask before replacing existing files or a folder (tests patch this function)."""
    names = "\n".join(str(p) for p in paths[:6]) + ("\n…" if len(paths) > 6 else "")
    answer = QMessageBox.question(
        parent, "Headlight", f"Replace what already exists?\n\n{names}",
        QMessageBox.StandardButton.Yes | QMessageBox.StandardButton.No,
        QMessageBox.StandardButton.No)
    return answer == QMessageBox.StandardButton.Yes


def png_image(fig) -> QImage:
    """The figure as a QImage, decoded from the same PNG bytes an export writes."""
    from viewer.figures.export import figure_bytes

    image = QImage()
    image.loadFromData(figure_bytes(fig, "png"), "PNG")
    return image


class CardDialog(QDialog):
    """Asks for the text set, an optional link-pairs file and the card folder."""

    def __init__(self, parent: QWidget | None, texts: str, pairs: str, out: str) -> None:
        super().__init__(parent)
        self.setWindowTitle("Export model-card folder")
        form = QFormLayout(self)
        self.texts_edit = self._row(form, "text set", texts, self._pick_texts)
        self.pairs_edit = self._row(form, "link pairs (optional)", pairs, self._pick_pairs)
        self.out_edit = self._row(form, "card folder", out, self._pick_out)
        buttons = QDialogButtonBox(QDialogButtonBox.StandardButton.Ok
                                   | QDialogButtonBox.StandardButton.Cancel)
        buttons.accepted.connect(self.accept)
        buttons.rejected.connect(self.reject)
        form.addRow(buttons)
        self.resize(620, self.sizeHint().height())

    def _row(self, form: QFormLayout, label: str, value: str, pick) -> QLineEdit:
        edit = QLineEdit(value)
        button = QPushButton("choose…")
        button.clicked.connect(pick)
        row = QHBoxLayout()
        row.addWidget(edit, 1)
        row.addWidget(button)
        form.addRow(label, row)
        return edit

    def _pick_texts(self) -> None:
        path, _ = QFileDialog.getOpenFileName(self, "Text set", self.texts_edit.text(),
                                              "Text sets (*.txt *.jsonl *.csv)")
        if path:
            self.texts_edit.setText(path)

    def _pick_pairs(self) -> None:
        path, _ = QFileDialog.getOpenFileName(self, "Link pairs", self.pairs_edit.text(),
                                              "Link pairs (*.jsonl)")
        if path:
            self.pairs_edit.setText(path)

    def _pick_out(self) -> None:
        path, _ = QFileDialog.getSaveFileName(
            self, "Card folder", self.out_edit.text(), "",
            options=QFileDialog.Option.DontConfirmOverwrite)
        if path:
            self.out_edit.setText(path)

    def values(self) -> tuple[str, str | None, str]:
        pairs = self.pairs_edit.text().strip()
        return self.texts_edit.text().strip(), pairs or None, self.out_edit.text().strip()


class PaneExporter(QObject):
    """The export menus and actions of a ``MainWindow`` (its panes, state and worker)."""

    def __init__(self, window) -> None:
        super().__init__(window)
        self.window = window
        self.current = None  # the last pane clicked (File → Export pane → current pane)
        self._press: dict[int, QPoint] = {}
        self._filtered: set[int] = set()
        self.last_card: str | None = None

    # -- menus
    def panes(self) -> list:
        w = self.window
        return [w.pair_grid, w.head_map, w.links, w.evidence, w.compare_pane.grid]

    def pane_name(self, pane) -> str:
        if pane is self.window.compare_pane.grid:
            return "compare grid"
        return pane.title

    def add_menus(self, file_menu: QMenu) -> None:
        menu = file_menu.addMenu("Export pane")
        self.export_menu = menu
        self.current_action = menu.addAction("Export last-clicked pane…")
        self.current_action.triggered.connect(lambda _c=False: self.export_dialog(
            self.current_pane()))
        self.copy_current_action = menu.addAction("Copy last-clicked pane's figure")
        self.copy_current_action.triggered.connect(lambda _c=False: self.copy_figure(
            self.current_pane()))
        menu.addSeparator()
        for pane in self.panes():
            sub = menu.addMenu(self.pane_name(pane))
            sub.addAction("Export figure and data…").triggered.connect(
                lambda _c=False, p=pane: self.export_dialog(p))
            sub.addAction("Copy figure").triggered.connect(
                lambda _c=False, p=pane: self.copy_figure(p))
        menu.aboutToShow.connect(self._label_current)
        self.card_action = file_menu.addAction("Export model-card folder…")
        self.card_action.setStatusTip("card.md, figures and card.json for a model card, from the "
                                      "open model and a text set")
        self.card_action.triggered.connect(lambda _c=False: self.card_dialog())

    def current_pane(self):
        return self.current if self.current is not None else self.window.pair_grid

    def _label_current(self) -> None:
        name = self.pane_name(self.current_pane())
        self.current_action.setText(f"Export {name}…")
        self.copy_current_action.setText(f"Copy {name} figure")

    # -- canvases: remember the clicked pane, right-click menu
    def canvases_attached(self) -> None:
        for pane in self.panes():
            canvas = pane.canvas
            if canvas is not None and id(canvas) not in self._filtered:
                canvas.installEventFilter(self)
                self._filtered.add(id(canvas))

    def _pane_of(self, obj):
        for pane in self.panes():
            if pane.canvas is obj:
                return pane
        return None

    def eventFilter(self, obj, event) -> bool:  # noqa: N802 - Qt name
        kind = event.type()
        if kind == QEvent.Type.MouseButtonPress:
            pane = self._pane_of(obj)
            if pane is not None:
                self.current = pane
                if event.button() == Qt.MouseButton.RightButton:
                    self._press[id(obj)] = event.position().toPoint()
        elif (kind == QEvent.Type.MouseButtonRelease
              and event.button() == Qt.MouseButton.RightButton):
            start = self._press.pop(id(obj), None)
            pos = event.position().toPoint()
            # a right-drag pans the pair grid; only a right click opens the menu
            if start is not None and (pos - start).manhattanLength() <= 4:
                pane = self._pane_of(obj)
                if pane is not None:
                    self.context_menu(pane).popup(obj.mapToGlobal(pos))
        elif kind == QEvent.Type.ContextMenu and event.reason() != event.Reason.Mouse:
            pane = self._pane_of(obj)
            if pane is not None:
                self.context_menu(pane).popup(obj.mapToGlobal(event.pos()))
                return True
        return False

    def context_menu(self, pane) -> QMenu:
        menu = QMenu(pane)
        menu.setAttribute(Qt.WidgetAttribute.WA_DeleteOnClose)
        name = self.pane_name(pane)
        menu.addAction(f"Export {name} figure and data…").triggered.connect(
            lambda _c=False: self.export_dialog(pane))
        menu.addAction("Copy figure").triggered.connect(lambda _c=False: self.copy_figure(pane))
        return menu

    # -- pane export
    def _build(self, pane) -> PaneExport | None:
        try:
            return build_export(pane)
        except HeadlightError as exc:
            self.window.show_error(str(exc))
            return None

    def default_folder(self) -> Path:
        value = self.window.settings.value("export/folder")
        folder = Path(str(value)) if value else Path.home()
        return folder if folder.is_dir() else Path.home()

    def export_dialog(self, pane) -> None:
        export = self._build(pane)
        if export is None:
            return
        start = str(self.default_folder() / f"{export.stem}.png")
        path, _ = QFileDialog.getSaveFileName(
            self.window, f"Export {self.pane_name(pane)} (PNG, SVG, PDF, CSV and JSON)", start,
            "Figure and data (*.png *.svg *.pdf *.csv *.json)",
            options=QFileDialog.Option.DontConfirmOverwrite)
        if path:
            self.export_to(pane, path, export=export)

    def export_to(self, pane, path: str | Path, *,
                  export: PaneExport | None = None) -> list[Path] | None:
        """Write ``pane``'s export at ``path`` (its suffix, if a known one, is dropped).

        Existing files are replaced only after ``confirm_overwrite``; returns the files written,
        or None when nothing was written (refused, or an error shown in the dialog).
        """
        path = Path(path)
        if path.suffix.lower().lstrip(".") in (*("png", "svg", "pdf"), *DATA_FORMATS):
            path = path.with_suffix("")
        if export is None:
            export = self._build(pane)
            if export is None:
                return None
        existing = [p for p in export_paths(path) if p.exists()]
        if existing and not confirm_overwrite(self.window, existing):
            self.window.set_status("export cancelled: nothing was replaced")
            return None
        try:
            written = write_export(export, path, force=bool(existing))
        except HeadlightError as exc:
            self.window.show_error(str(exc))
            return None
        self.window.settings.setValue("export/folder", str(path.parent))
        self.window.set_status(f"exported {self.pane_name(pane)} to {path}.png/.svg/.pdf/.csv/"
                               ".json")
        return written

    def copy_figure(self, pane) -> bool:
        export = self._build(pane)
        if export is None:
            return False
        image = png_image(export.figure)
        if image.isNull():
            self.window.show_error("could not copy the figure: the PNG did not decode")
            return False
        QApplication.clipboard().setImage(image)
        self.window.set_status(f"copied the {self.pane_name(pane)} figure "
                               f"({image.width()}×{image.height()} px, 300 dpi)")
        return True

    # -- card export
    def card_defaults(self) -> tuple[str, str, str]:
        state = self.window.state
        texts = state.textset.path if state.textset is not None else ""
        pairs = state.link_pairs.path if state.link_pairs is not None else ""
        name = state.model.name if state.model is not None else "model"
        out = str(self.default_folder() / f"{sanitise_name(name, fallback='model')}-card")
        return texts, pairs, out

    def card_dialog(self) -> None:
        if self.window.state.model is None:
            self.window.show_error("open a model first; the card describes the open model")
            return
        dialog = CardDialog(self.window, *self.card_defaults())
        if dialog.exec() != QDialog.DialogCode.Accepted:
            return
        texts, pairs, out = dialog.values()
        self.export_card(texts, pairs, out)

    def export_card(self, texts: str, pairs: str | None, out: str) -> bool:
        """Start the card export on the worker; True when it was started."""
        w = self.window
        if w.state.model is None:
            w.show_error("open a model first; the card describes the open model")
            return False
        if not texts:
            w.show_error("a card export needs a text set file")
            return False
        for label, value in (("text set", texts), ("link-pairs file", pairs)):
            if value and not Path(value).is_file():
                w.show_error(f"the {label} {value} does not exist")
                return False
        if not out:
            w.show_error("choose a folder for the card")
            return False
        target = Path(out)
        force = False
        if target.exists():
            if not confirm_overwrite(w, [target]):
                w.set_status("card export cancelled: nothing was replaced")
                return False
            force = True
        w.worker.submit("card", card_job, "main", str(texts), str(pairs) if pairs else None,
                        str(target), force)
        w.set_status(f"writing the model-card folder {target}…")
        return True

    def card_done(self, path: str) -> None:
        self.last_card = path
        self.window.settings.setValue("export/folder", str(Path(path).parent))
        self.window.set_status(f"model-card folder written: {path} (card.md, figures, card.json)")
