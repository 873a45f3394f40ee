"""Exporting what a pane shows, the Qt half: menus, file dialogs, the clipboard, the card.

``build_export(pane)`` reads what a pane of the window shows and calls the plain builders of
``viewer.session.exports`` (the same ``viewer.figures`` builders the panes draw with).
``PaneExporter`` adds File → Export pane ▸ …, the canvases' right-click menus, "Copy figure",
and File → Export model-card folder… (run on the worker with the window's open model through
``viewer.session.jobs.card_job``).

An existing file is only replaced after ``confirm_overwrite`` said yes; tests patch that function.
"""

from __future__ import annotations

from pathlib import Path

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
from viewer.session import exports
from viewer.session.exports import DATA_FORMATS, PaneExport, Source, export_paths, write_export


def build_export(pane) -> PaneExport:
    """The export of one of the window's figure panes, from what the pane shows now."""
    from viewer.gui.panes.evidence import EvidencePane
    from viewer.gui.panes.fixation import FixationPane
    from viewer.gui.panes.head_map import HeadMapPane
    from viewer.gui.panes.links import LinksPane
    from viewer.gui.panes.pair_grid import PairGridPane

    state = pane.state
    model = state.model
    analysis = state.analysis
    source = Source(
        model.name
        if model is not None
        else getattr(getattr(analysis, "recording", None), "model_name", "") or "model",
        model.folder if model is not None else None,
    )
    if isinstance(pane, PairGridPane):
        name = "compare grid" if pane.slot == "compare" else "pair grid"
        marked = name == "pair grid"
        return exports.pair_grid_export(
            pane.analysis,
            source,
            layer=state.layer,
            head=state.head,
            query=state.source if marked else None,
            key=state.target if marked else None,
            pane=name,
            block=pane.block_mode,
        )
    if isinstance(pane, HeadMapPane):
        from viewer.session.metrics import head_values

        values = head_values(state)
        if isinstance(values, str):
            raise HeadlightError(f"nothing to export in the head map: {values}")
        text = analysis.recording.text if analysis is not None else state.text
        ts = state.textset
        over_set = state.scope == "set" and ts is not None and "text set" in values.title
        return exports.head_map_export(
            values,
            source,
            metric=state.metric,
            text=text,
            layer=state.layer,
            head=state.head,
            scope=state.scope,
            text_set=(ts.path, len(ts.rows)) if over_set else None,
        )
    if isinstance(pane, LinksPane):
        if pane.view_box.currentData() == "file" and state.link_pairs is not None:
            return exports.link_accuracy_export(
                state.link_pairs, source, layer=state.layer, head=state.head, text=state.text
            )
        return exports.links_export(
            analysis, source, layer=state.layer, head=state.head, query=state.source, key=state.target
        )
    if isinstance(pane, EvidencePane):
        return exports.evidence_export(analysis, state.evidence, source, token=state.source)
    if isinstance(pane, FixationPane):
        ts = state.textset
        return exports.fixation_export(
            state.shortcuts,
            source,
            head=pane.focus_head(),
            word=state.word,
            text_set=None if ts is None else ts.path,
        )
    raise HeadlightError(f"the {pane.title} pane has no export")


# -- Qt ---------------------------------------------------------------------------------------------


def confirm_overwrite(parent: QWidget | None, paths: list[Path]) -> bool:
    """Ask before replacing existing files or a folder (tests patch this function)."""
    names = "\n".join(str(p) for p in paths[:6]) + ("\n…" if len(paths) > 6 else "")
    answer = QMessageBox.question(
        parent,
        "Headlight",
        f"Replace what already exists?\n\n{names}",
        QMessageBox.StandardButton.Yes | QMessageBox.StandardButton.No,
        QMessageBox.StandardButton.No,
    )
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
        buttons = QDialogButtonBox(
            QDialogButtonBox.StandardButton.Ok | QDialogButtonBox.StandardButton.Cancel
        )
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
        path, _ = QFileDialog.getOpenFileName(
            self, "Text set", self.texts_edit.text(), "Text sets (*.txt *.jsonl *.csv)"
        )
        if path:
            self.texts_edit.setText(path)

    def _pick_pairs(self) -> None:
        path, _ = QFileDialog.getOpenFileName(
            self, "Link pairs", self.pairs_edit.text(), "Link pairs (*.jsonl)"
        )
        if path:
            self.pairs_edit.setText(path)

    def _pick_out(self) -> None:
        path, _ = QFileDialog.getSaveFileName(
            self, "Card folder", self.out_edit.text(), "", options=QFileDialog.Option.DontConfirmOverwrite
        )
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
        return [w.pair_grid, w.head_map, w.links, w.evidence, w.compare_pane.grid, w.fixation]

    def pane_name(self, pane) -> str:
        if pane is self.window.compare_pane.grid:
            return "compare grid"
        return pane.title

    def add_menus(self, file_menu: QMenu) -> None:
        menu = file_menu.addMenu("Export pane")
        self.export_menu = menu
        self.current_action = menu.addAction("Export last-clicked pane…")
        self.current_action.triggered.connect(lambda _c=False: self.export_dialog(self.current_pane()))
        self.copy_current_action = menu.addAction("Copy last-clicked pane's figure")
        self.copy_current_action.triggered.connect(lambda _c=False: self.copy_figure(self.current_pane()))
        menu.addSeparator()
        for pane in self.panes():
            sub = menu.addMenu(self.pane_name(pane))
            sub.addAction("Export figure and data…").triggered.connect(
                lambda _c=False, p=pane: self.export_dialog(p)
            )
            sub.addAction("Copy figure").triggered.connect(lambda _c=False, p=pane: self.copy_figure(p))
        menu.aboutToShow.connect(self._label_current)
        self.card_action = file_menu.addAction("Export model-card folder…")
        self.card_action.setStatusTip(
            "card.md, figures and card.json for a model card, from the open model and a text set"
        )
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
        elif kind == QEvent.Type.MouseButtonRelease and event.button() == Qt.MouseButton.RightButton:
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
            lambda _c=False: self.export_dialog(pane)
        )
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
            self.window,
            f"Export {self.pane_name(pane)} (PNG, SVG, PDF, CSV and JSON)",
            start,
            "Figure and data (*.png *.svg *.pdf *.csv *.json)",
            options=QFileDialog.Option.DontConfirmOverwrite,
        )
        if path:
            self.export_to(pane, path, export=export)

    def export_to(self, pane, path: str | Path, *, export: PaneExport | None = None) -> list[Path] | None:
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
        self.window.set_status(f"exported {self.pane_name(pane)} to {path}.png/.svg/.pdf/.csv/.json")
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
        self.window.set_status(
            f"copied the {self.pane_name(pane)} figure ({image.width()}×{image.height()} px, 300 dpi)"
        )
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
        w.controller.export_card(texts, pairs, str(target), force)
        return True

    def card_done(self, path: str) -> None:
        self.last_card = path
        self.window.settings.setValue("export/folder", str(Path(path).parent))
        self.window.set_status(f"model-card folder written: {path} (card.md, figures, card.json)")
