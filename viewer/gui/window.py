"""The main window: the text box, the linked panes, the docks, the worker and the status bar.

The window owns the one ``Selection`` and the ``Worker``. Panes observe the state and write to
it; the window observes the few fields that start model work (a chosen text-set row, a new run
needing evidence) and stores the worker's results back into the state on the GUI thread.
"""

from __future__ import annotations

import sys
import time
from pathlib import Path

from PySide6.QtCore import QByteArray, QRect, QSettings, QSize, QStandardPaths, Qt, QTimer, Signal
from PySide6.QtGui import QAction, QGuiApplication, QIcon, QKeySequence, QShortcut
from PySide6.QtWidgets import (
    QDockWidget,
    QFileDialog,
    QHBoxLayout,
    QLabel,
    QMainWindow,
    QMessageBox,
    QPlainTextEdit,
    QProgressBar,
    QPushButton,
    QSplitter,
    QToolButton,
    QVBoxLayout,
    QWidget,
)

from viewer.errors import HeadlightError
from viewer.gui.badge import CheckBadge
from viewer.gui.export import PaneExporter
from viewer.gui.panes.base import ElidedLabel
from viewer.gui.panes.compare import ComparePane
from viewer.gui.panes.evidence import EvidencePane
from viewer.gui.panes.fixation import FixationPane
from viewer.gui.panes.head_map import HeadMapPane
from viewer.gui.panes.links import LinksPane
from viewer.gui.panes.pair_grid import PairGridPane
from viewer.gui.panes.shortcuts import ShortcutPane
from viewer.gui.panes.textset import TextSetPane
from viewer.gui.textbox import TextBox, note_label
from viewer.gui.worker import Worker
from viewer.session import session_file as sessions
from viewer.session.controller import Controller
from viewer.session.state import Selection

RECENT_MAX = 8
DEFAULT_SIZE = QSize(1440, 900)  # the window's size on a screen with room for it
FRAME_ROOM = QSize(16, 40)  # left for the window manager's frame and title bar (common practice)
COMPARE_DOCK_HEIGHT = 360
PANE_MINIMUM_HEIGHTS = {"head_map": 140, "links": 120, "pair_grid": 200, "evidence": 130}
"""Heights below which a pane's figure no longer holds its labels and a few rows (measured on
the demo at 1366 × 768): the pair grid keeps several query rows beside its key labels."""
IDLE_COLLECT_S = 1.5  # no drawing or model work for this long: time for a full collection
IDLE_CHECK_MS = 1000
ICON = Path(__file__).parent / "icons" / "headlight.svg"
STYLE = """
QLabel#paneTitle { font-weight: bold; color: #1d2b36; }
QLabel#paneMessage { color: #4a5560; font-size: 12px; }
"""


def app_icon() -> QIcon:
    return QIcon(str(ICON))


class _NotesEdit(QPlainTextEdit):
    def sizeHint(self) -> QSize:  # noqa: N802 - a short dock leaves room for the panes
        return QSize(480, 150)


class MainWindow(QMainWindow):
    """Headlight's window. ``settings`` and ``config_dir`` are injectable for tests."""

    error_shown = Signal(str)

    def __init__(
        self,
        *,
        settings: QSettings | None = None,
        config_dir: Path | None = None,
        restore_geometry: bool = True,
    ) -> None:
        super().__init__()
        self.state = Selection()
        self.worker = Worker(self)
        self.settings = settings or QSettings("Headlight", "Headlight")
        if config_dir is None:
            base = QStandardPaths.writableLocation(QStandardPaths.StandardLocation.AppConfigLocation)
            config_dir = Path(base or Path.home() / ".config" / "headlight")
        self.config_dir = Path(config_dir)
        self.errors: list[str] = []
        self.error_dialog: QMessageBox | None = None
        self.controller = Controller(self.state, self.worker, self)
        self.setWindowTitle("Headlight")
        self.setWindowIcon(app_icon())
        self.setStyleSheet(STYLE)
        self._build_actions()
        self._build_central()
        self._build_docks()
        self._build_menus()
        self._build_status()
        self._build_keys()
        self._wire_worker()
        self._wire_state()
        self._busy_at = time.monotonic()
        self.collector = QTimer(self)
        self.collector.setInterval(IDLE_CHECK_MS)
        self.collector.timeout.connect(self.collect_when_idle)
        self.collector.start()
        self.setGeometry(default_geometry(available_geometry()))
        if restore_geometry:
            geometry = self.settings.value("window/geometry")
            if isinstance(geometry, QByteArray):
                self.restoreGeometry(geometry)
            layout = self.settings.value("window/state")
            if isinstance(layout, QByteArray):
                self.restoreState(layout)

    # -- building ----------------------------------------------------------------------------------
    def _action(self, text: str, slot, shortcut=None, tip: str = "") -> QAction:
        action = QAction(text, self)
        action.triggered.connect(lambda _checked=False: slot())
        if shortcut is not None:
            action.setShortcut(QKeySequence(shortcut))
        if tip:
            action.setToolTip(tip)
            action.setStatusTip(tip)
        self.addAction(action)
        return action

    def _build_actions(self) -> None:
        self.open_model_action = self._action(
            "Open model folder…",
            self.open_model_dialog,
            QKeySequence.StandardKey.Open,
            "open a local checkpoint folder (Ctrl+O)",
        )
        self.run_action = self._action(
            "Run", self.run_current, None, "record the text and show it in every pane (Ctrl+Enter)"
        )
        self.cancel_action = self._action("Cancel", self.cancel, "Esc", "stop the model work in progress")
        self.cancel_action.setEnabled(False)
        self.open_set_action = self._action(
            "Open text set…",
            self.open_textset_dialog,
            None,
            "list the predictions of a .txt, .jsonl, .csv or .parquet file or a saved dataset folder",
        )
        self.open_pairs_action = self._action(
            "Open link pairs…", self.open_pairs_dialog, None, "per-head link accuracy over a link-pairs file"
        )
        self.shortcuts_action = self._action(
            "Search shortcuts", self.search_shortcuts, None, "knock each word out of every text of the set"
        )
        self.insert_action = self._action(
            "Insertion test",
            self.run_insertions,
            None,
            "insert each of the report's top words into the texts of other classes and count "
            "the flips into its class (does the word alone drive the prediction?)",
        )
        self.mechanism_action = self._action(
            "Mechanism check",
            self.run_mechanism,
            None,
            "rerun the lead insertion test with the selected head knocked out (the selected "
            "layer's heads when the head mean is selected): how much of the flip rate they carry",
        )
        self.compare_action = self._action(
            "Compare", self.run_compare, None, "run the second text or checkpoint"
        )
        self.clear_compare_action = self._action("Clear", self.clear_compare, None, "leave compare mode")
        self.save_session_action = self._action(
            "Save session…", self.save_session_dialog, QKeySequence.StandardKey.Save
        )
        self.open_session_action = self._action("Open session…", self.open_session_dialog)
        self.quit_action = self._action("Quit", self.close, QKeySequence.StandardKey.Quit)
        self.evidence_action = self._action(
            "Evidence after every run",
            self.run_evidence,
            None,
            "compute the evidence strip, head importance and knockout after each run "
            "(off: only on demand, for large models)",
        )
        self.evidence_action.setCheckable(True)
        self.evidence_action.setChecked(True)
        self.evidence_now_action = self._action(
            "Compute evidence", self.run_evidence, None, "compute the evidence strip for this text now"
        )

    def _build_central(self) -> None:
        central = QWidget()
        layout = QVBoxLayout(central)
        layout.setContentsMargins(6, 4, 6, 2)
        bar = QHBoxLayout()
        self.model_label = QLabel("no model open")
        self.model_label.setTextFormat(Qt.TextFormat.PlainText)
        self.model_label.setMinimumWidth(180)
        self.model_label.setWordWrap(True)
        open_button = QToolButton()
        open_button.setDefaultAction(self.open_model_action)
        self.text_edit = TextBox()
        self.text_edit.setPlaceholderText("Type or paste a text, then press Ctrl+Enter")
        self.text_edit.setFixedHeight(58)
        self.text_edit.setTabChangesFocus(True)
        self.text_note = note_label(self.text_edit)
        middle = QVBoxLayout()
        middle.setSpacing(2)
        middle.addWidget(self.text_edit)
        middle.addWidget(self.text_note)
        self.run_button = QPushButton("Run  (Ctrl+Enter)")
        self.run_button.setToolTip(self.run_action.toolTip())
        self.run_button.clicked.connect(self.run_current)
        left = QVBoxLayout()
        left.addWidget(open_button)
        left.addWidget(self.model_label)
        bar.addLayout(left)
        bar.addLayout(middle, 1)
        bar.addWidget(self.run_button)
        layout.addLayout(bar)
        self.head_map = HeadMapPane(self.state)
        self.links = LinksPane(self.state)
        self.pair_grid = PairGridPane(self.state)
        self.pair_grid.painted.connect(self._grid_painted)
        self.evidence = EvidencePane(self.state)
        self.evidence.span_chosen.connect(lambda first, last: self.controller.knock_out_span(first, last))
        for pane in (self.head_map, self.links, self.evidence):
            pane.waits_for = self.pair_grid  # after a run, the pair grid is painted first
        for name, height in PANE_MINIMUM_HEIGHTS.items():
            getattr(self, name).setMinimumHeight(height)
        left_split = QSplitter(Qt.Orientation.Vertical)
        left_split.addWidget(self.head_map)
        left_split.addWidget(self.links)
        left_split.setSizes([430, 330])
        right_split = QSplitter(Qt.Orientation.Vertical)
        right_split.addWidget(self.pair_grid)
        right_split.addWidget(self.evidence)
        right_split.setSizes([470, 330])
        self.panes_split = QSplitter(Qt.Orientation.Horizontal)
        self.panes_split.addWidget(left_split)
        self.panes_split.addWidget(right_split)
        self.panes_split.setSizes([640, 800])
        layout.addWidget(self.panes_split, 1)
        self.setCentralWidget(central)

    def _dock(self, title: str, widget: QWidget, name: str, area) -> QDockWidget:
        dock = QDockWidget(title, self)
        dock.setObjectName(name)
        dock.setWidget(widget)
        self.addDockWidget(area, dock)
        return dock

    def _build_docks(self) -> None:
        self.textset_pane = TextSetPane(self.state, self.open_set_action)
        self.shortcut_pane = ShortcutPane(
            self.state, self.shortcuts_action, self.insert_action, mechanism_action=self.mechanism_action
        )
        self.fixation = FixationPane(self.state)
        self.compare_pane = ComparePane(self.state, self.compare_action, self.clear_compare_action)
        self.notes_edit = _NotesEdit()
        self.notes_edit.setPlaceholderText("notes saved with the session")
        self.notes_edit.textChanged.connect(lambda: self.state.set_notes(self.notes_edit.toPlainText()))
        bottom = Qt.DockWidgetArea.BottomDockWidgetArea
        self.textset_dock = self._dock("text set", self.textset_pane, "textsetDock", bottom)
        self.shortcut_dock = self._dock("shortcut report", self.shortcut_pane, "shortcutDock", bottom)
        self.fixation_dock = self._dock("fixation plot", self.fixation, "fixationDock", bottom)
        self.compare_dock = self._dock("compare", self.compare_pane, "compareDock", bottom)
        self.notes_dock = self._dock("notes", self.notes_edit, "notesDock", bottom)
        self.tabifyDockWidget(self.textset_dock, self.shortcut_dock)
        self.tabifyDockWidget(self.shortcut_dock, self.fixation_dock)
        self.tabifyDockWidget(self.fixation_dock, self.compare_dock)
        self.tabifyDockWidget(self.compare_dock, self.notes_dock)
        self.textset_dock.raise_()
        self._docks_sized = False

    def _build_menus(self) -> None:
        file_menu = self.menuBar().addMenu("&File")
        file_menu.addAction(self.open_model_action)
        self.recent_menu = file_menu.addMenu("Recent models")
        file_menu.addSeparator()
        file_menu.addAction(self.open_set_action)
        file_menu.addAction(self.open_pairs_action)
        file_menu.addSeparator()
        file_menu.addAction(self.open_session_action)
        file_menu.addAction(self.save_session_action)
        file_menu.addSeparator()
        self.exporter = PaneExporter(self)
        self.exporter.add_menus(file_menu)
        file_menu.addSeparator()
        file_menu.addAction(self.quit_action)
        run_menu = self.menuBar().addMenu("&Run")
        run_menu.addAction(self.run_action)
        run_menu.addAction(self.cancel_action)
        run_menu.addSeparator()
        run_menu.addAction(self.evidence_now_action)
        run_menu.addAction(self.evidence_action)
        run_menu.addSeparator()
        run_menu.addAction(self.shortcuts_action)
        run_menu.addAction(self.insert_action)
        run_menu.addAction(self.compare_action)
        view_menu = self.menuBar().addMenu("&View")
        for dock in (
            self.textset_dock,
            self.shortcut_dock,
            self.fixation_dock,
            self.compare_dock,
            self.notes_dock,
        ):
            view_menu.addAction(dock.toggleViewAction())
        self._fill_recent()

    def _build_status(self) -> None:
        bar = self.statusBar()
        # ends in "…" when the bar is narrower than the message (a laptop's 1366 pixels), the
        # whole message in the tooltip, rather than cut off under the permanent widgets
        self.status_label = ElidedLabel("starting…")
        bar.addWidget(self.status_label, 1)
        self.progress = QProgressBar()
        self.progress.setMaximumWidth(200)
        self.progress.setMaximumHeight(14)
        self.progress.setTextVisible(False)
        self.progress.setVisible(False)
        bar.addPermanentWidget(self.progress)
        self.cancel_button = QToolButton()
        self.cancel_button.setDefaultAction(self.cancel_action)
        bar.addPermanentWidget(self.cancel_button)
        self.badge = CheckBadge(self.state)
        bar.addPermanentWidget(self.badge)

    def _build_keys(self) -> None:
        for keys in ("Ctrl+Return", "Ctrl+Enter"):
            QShortcut(QKeySequence(keys), self, self.run_current)
        moves = {
            Qt.Key.Key_Left: lambda: self.state.move_head(-1),
            Qt.Key.Key_Right: lambda: self.state.move_head(1),
            Qt.Key.Key_Up: lambda: self.state.move_layer(-1),
            Qt.Key.Key_Down: lambda: self.state.move_layer(1),
        }
        for key, fn in moves.items():
            shortcut = QShortcut(QKeySequence(key), self.panes_split, fn)
            shortcut.setContext(Qt.ShortcutContext.WidgetWithChildrenShortcut)

    @property
    def figure_panes(self) -> list:
        return [
            self.head_map,
            self.links,
            self.pair_grid,
            self.evidence,
            self.compare_pane.grid,
            self.fixation,
        ]

    def showEvent(self, event) -> None:  # noqa: N802
        super().showEvent(event)
        if not self._docks_sized and not self.settings.value("window/state"):
            self._docks_sized = True
            QTimer.singleShot(
                0, lambda: self.resizeDocks([self.textset_dock], [170], Qt.Orientation.Vertical)
            )

    # -- start-up
    def start(self, model: str | None = None, text: str | None = None, restore_last: bool = True) -> None:
        """After the window is on screen: load the drawing library and a model, in background."""
        self.controller.start(
            model=model, text=text, last_session=self.last_session_path if restore_last else None
        )

    @property
    def canvases_ready(self) -> bool:
        return all(p.ready for p in self.figure_panes)

    # -- the controller's view -------------------------------------------------------------------
    def editor_text(self) -> str:
        return self.text_edit.text()  # the whole text, also when the box shows only its start

    def set_editor_text(self, text: str) -> None:
        self.text_edit.setPlainText(text)

    def model_opening(self, folder: str) -> None:
        self.model_label.setText(f"opening {Path(folder).name}…")

    def model_opened(self, info, remember: bool) -> None:
        self.model_label.setText(info.describe())
        self.model_label.setToolTip(info.folder)
        if remember:
            self._add_recent(info.folder)

    def model_not_opened(self, info) -> None:
        """An open failed or was cancelled: the label names the model still open, if any."""
        self.model_label.setText(info.describe() if info is not None else "no model open")
        self.model_label.setToolTip(info.folder if info is not None else "")

    def show_panel(self, name: str) -> None:
        dock = {"textset": self.textset_dock, "shortcuts": self.shortcut_dock, "compare": self.compare_dock}[
            name
        ]
        dock.raise_()
        if name == "compare":
            # room for the compared grid, and the panes above keep theirs (their minimum sizes)
            want = min(COMPARE_DOCK_HEIGHT, int(self.height() * 0.45))
            if dock.height() < want:
                self.resizeDocks([dock], [want], Qt.Orientation.Vertical)

    def evidence_after_runs(self) -> bool:
        return self.evidence_action.isChecked()

    def later(self, msecs: int, fn) -> None:
        QTimer.singleShot(msecs, self, fn)

    def ask_base_model(self, adapter: str, message: str) -> str | None:
        """Ask for an adapter's base model folder (the adapter names none on this machine)."""
        return choose_base_folder(self, adapter, message)

    def figures_ready(self, seconds: float) -> None:
        for pane in self.figure_panes:
            pane.attach_canvas()
        self.exporter.canvases_attached()
        self.set_status(f"drawing library ready ({seconds:.1f} s)")

    def card_written(self, path: str) -> None:
        self.exporter.card_done(path)

    def set_status(self, text: str) -> None:
        self.status_label.setText(text)

    def show_error(self, message: str) -> None:
        """A non-blocking dialog with the one-line message; the window stays usable."""
        self.errors.append(message)
        self.set_status(f"error: {message}")
        if self.error_dialog is not None:
            self.error_dialog.close()
        box = QMessageBox(QMessageBox.Icon.Warning, "Headlight", message, QMessageBox.StandardButton.Ok, self)
        box.setWindowModality(Qt.WindowModality.WindowModal)
        self.error_dialog = box
        box.open()
        self.error_shown.emit(message)

    # -- worker plumbing
    def _wire_worker(self) -> None:
        w = self.worker
        w.progress.connect(self._on_progress)
        w.finished.connect(lambda name, result: self.controller.finished(name, result))
        w.failed.connect(lambda name, message: self.controller.failed(name, message))
        w.cancelled.connect(lambda name: self.controller.cancelled(name))
        w.started.connect(lambda _k: self._busy(True))
        w.idle.connect(lambda: self._busy(False))

    def _busy(self, busy: bool) -> None:
        self.cancel_action.setEnabled(busy)
        self.progress.setVisible(busy)
        if busy:
            self.progress.setRange(0, 0)

    def _on_progress(self, name: str, done: int, total: int, message: str) -> None:
        if total > 0:
            self.progress.setRange(0, total)
            self.progress.setValue(done)
        else:
            self.progress.setRange(0, 0)
        self.set_status(message)

    def collect_when_idle(self) -> bool:
        """Run a full garbage collection if nothing has been drawn or computed for a while.

        With ``viewer.gui.app.tune_collector`` the collector leaves full passes to this; a
        pass costs a pause, which an idle window does not show. True when it collected."""
        import gc

        now = time.monotonic()
        if self.worker.busy or not all(pane.idle for pane in self.figure_panes):
            self._busy_at = now
            return False
        if now - self._busy_at < IDLE_COLLECT_S or gc.get_count()[2] == 0:
            return False
        gc.collect()
        self._busy_at = time.monotonic()
        return True

    def _grid_painted(self) -> None:
        self.controller.painted(self.pair_grid.drawn_recording)

    # -- actions (menus, keys, tests): the controller decides what runs
    def open_model_dialog(self) -> None:
        folder = QFileDialog.getExistingDirectory(self, "Open a model folder")
        if folder:
            self.open_model(folder, run_after=bool(self.text_edit.text().strip()))

    def open_model(self, folder: str, *, run_after: bool = False, remember: bool = True) -> None:
        self.controller.open_model(folder, run_after=run_after, remember=remember)

    def _add_recent(self, folder: str) -> None:
        recent = [f for f in self.recent_models() if f != folder]
        self.settings.setValue("recent_models", [folder, *recent][:RECENT_MAX])
        self._fill_recent()

    def recent_models(self) -> list[str]:
        value = self.settings.value("recent_models") or []
        if isinstance(value, str):
            value = [value]
        return [str(v) for v in value]

    def _fill_recent(self) -> None:
        self.recent_menu.clear()
        recent = self.recent_models()
        if not recent:
            self.recent_menu.addAction("(none yet)").setEnabled(False)
        for folder in recent:
            action = self.recent_menu.addAction(folder)
            action.triggered.connect(lambda _c=False, f=folder: self.open_model(f))

    def run_current(self) -> None:
        """Ctrl+Enter: record the text box's text."""
        self.controller.run_current()

    def run_text(self, text: str, label: str | None = None) -> None:
        self.controller.run_text(text, label)

    def run_evidence(self) -> None:
        self.controller.run_evidence()

    def cancel(self) -> None:
        self.controller.cancel()

    def open_textset_dialog(self) -> None:
        from viewer.gui.textset_dialog import TextSetDialog

        dialog = TextSetDialog(self)
        if dialog.exec() == TextSetDialog.DialogCode.Accepted and dialog.source() is not None:
            self.open_textset(dialog.source())

    def open_textset(self, path) -> None:
        """Open a text set: a path, or a ``TextSource`` naming its columns and split."""
        self.controller.open_textset(path)

    def open_pairs_dialog(self) -> None:
        path, _ = QFileDialog.getOpenFileName(self, "Open link pairs", "", "Link pairs (*.jsonl)")
        if path:
            self.open_pairs(path)

    def open_pairs(self, path: str) -> None:
        self.controller.open_pairs(path)

    def search_shortcuts(self) -> None:
        pane = self.shortcut_pane
        self.controller.search_shortcuts(pane.phrases_box.isChecked(), pane.every_box.isChecked())

    def run_insertions(self) -> None:
        pane = self.shortcut_pane
        self.controller.run_insertions(pane.insertion_words(), own=pane.own_word())

    def run_mechanism(self) -> None:
        self.controller.mechanism_check(own=self.shortcut_pane.own_word())

    def run_compare(self) -> None:
        self.controller.run_compare()

    def clear_compare(self) -> None:
        self.controller.clear_compare()

    # -- state observers
    def _wire_state(self) -> None:
        self.state.events.item.connect(self.controller.item_chosen)
        self.state.events.notes.connect(self._notes_changed)

    def _notes_changed(self, notes: str) -> None:
        if self.notes_edit.toPlainText() != notes:
            self.notes_edit.blockSignals(True)
            self.notes_edit.setPlainText(notes)
            self.notes_edit.blockSignals(False)

    # -- sessions ----------------------------------------------------------------------------------
    @property
    def last_session_path(self) -> Path:
        return self.config_dir / "last-session.json"

    def save_session(self, path: str | Path) -> None:
        sessions.save(path, self.controller.capture_session())

    def save_session_dialog(self) -> None:
        path, _ = QFileDialog.getSaveFileName(
            self, "Save session", "session.headlight.json", "Headlight sessions (*.json)"
        )
        if path:
            try:
                self.save_session(path)
                self.set_status(f"session saved to {path}")
            except HeadlightError as exc:
                self.show_error(str(exc))

    def open_session_dialog(self) -> None:
        path, _ = QFileDialog.getOpenFileName(self, "Open session", "", "Headlight sessions (*.json)")
        if path:
            self.open_session(path)

    def open_session(self, path: str | Path) -> None:
        try:
            self.controller.restore_session(sessions.load(path))
        except HeadlightError as exc:
            self.show_error(str(exc))

    # -- closing
    def closeEvent(self, event) -> None:  # noqa: N802
        if self.state.model is not None:
            try:
                self.save_session(self.last_session_path)
            except HeadlightError as exc:  # say so, and let the user keep the window open
                print(f"headlight: {exc}", file=sys.stderr)
                if not confirm_close_unsaved(self, str(exc)):
                    event.ignore()
                    return
        self.settings.setValue("window/geometry", self.saveGeometry())
        self.settings.setValue("window/state", self.saveState())
        self.settings.sync()
        self.controller.shutdown()
        self.worker.shutdown()
        for pane in self.figure_panes:
            pane.detach()
        self.textset_pane.detach()
        self.shortcut_pane.detach()
        super().closeEvent(event)


def available_geometry() -> QRect:
    """The part of the primary screen a window may cover (without task bars and panels)."""
    screen = QGuiApplication.primaryScreen()
    return screen.availableGeometry() if screen is not None else QRect(0, 0, 1440, 900)


def default_geometry(available: QRect) -> QRect:
    """The window's first place: ``DEFAULT_SIZE``, or less so that it and its frame fit the
    ``available`` screen area, centred on it."""
    width = min(DEFAULT_SIZE.width(), available.width() - FRAME_ROOM.width())
    height = min(DEFAULT_SIZE.height(), available.height() - FRAME_ROOM.height())
    rect = QRect(0, 0, width, height)
    rect.moveCenter(available.center())
    return rect


def choose_base_folder(parent: QWidget, adapter: str, message: str) -> str | None:
    """The base model folder for an adapter, from a folder dialog (tests patch this)."""
    QMessageBox.information(
        parent,
        "Headlight",
        f"{message}\n\nChoose the base model's folder for the adapter {Path(adapter).name}.",
    )
    folder = QFileDialog.getExistingDirectory(parent, f"Base model for {Path(adapter).name}")
    return folder or None


def confirm_close_unsaved(parent: QWidget, reason: str) -> bool:
    """Ask whether to close although the session could not be saved (tests patch this)."""
    answer = QMessageBox.warning(
        parent,
        "Headlight",
        f"The session could not be saved: {reason}\n\nClose anyway?",
        QMessageBox.StandardButton.Close | QMessageBox.StandardButton.Cancel,
        QMessageBox.StandardButton.Cancel,
    )
    return answer == QMessageBox.StandardButton.Close
