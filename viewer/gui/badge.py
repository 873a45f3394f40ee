"""The check badge: the re-derivation check of the current recording, in the status bar.

It reads "check passed · max error 2.4e-07" or "check FAILED · max error 3.1e-02" (tolerance
1e-5, as ``headlight check``); clicking it opens the per-layer errors.
"""

from __future__ import annotations

from PySide6.QtWidgets import (
    QDialog,
    QDialogButtonBox,
    QLabel,
    QTableWidget,
    QTableWidgetItem,
    QToolButton,
    QVBoxLayout,
    QWidget,
)

from viewer.session.state import Selection

PASSED_STYLE = "QToolButton { color: #1b5e20; font-weight: bold; padding: 1px 6px; }"
FAILED_STYLE = "QToolButton { color: white; background: #b71c1c; font-weight: bold; padding: 1px 6px; }"
IDLE_STYLE = "QToolButton { color: #555555; padding: 1px 6px; }"


def badge_text(check, recorded: bool = False) -> str:
    if check is None:
        return "check: running…" if recorded else "check: no recording yet"
    verdict = "passed" if check.passed else "FAILED"
    return f"check {verdict} · max error {check.max_abs_error:.1e}"


class CheckBadge(QToolButton):
    """Observes ``analysis``; shows the verdict and opens ``CheckDialog`` on click."""

    def __init__(self, state: Selection, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self.state = state
        self.dialog: CheckDialog | None = None
        self.setAutoRaise(True)
        self.clicked.connect(self.open_details)
        state.events.analysis.connect(self._update)
        self._update(state.analysis)

    @property
    def check(self):
        a = self.state.analysis
        return None if a is None else a.check

    def _update(self, _analysis) -> None:
        check = self.check
        self.setText(badge_text(check, self.state.analysis is not None))
        if check is None:
            self.setStyleSheet(IDLE_STYLE)
            self.setToolTip("the re-derivation check runs on every recording")
            return
        self.setStyleSheet(PASSED_STYLE if check.passed else FAILED_STYLE)
        self.setToolTip(
            "softmax(QKᵀ·scale + mask) re-derived from the captured queries and keys, compared "
            f"with the model's own probabilities; tolerance {check.tolerance:g}. Click for the "
            "errors per layer."
        )

    def open_details(self) -> None:
        check = self.check
        if check is None:
            return
        self.dialog = CheckDialog(check, self.window())
        self.dialog.open()


class CheckDialog(QDialog):
    """Per-layer (and worst head) errors of one re-derivation check."""

    def __init__(self, check, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self.setWindowTitle("re-derivation check")
        layout = QVBoxLayout(self)
        verdict = "passed" if check.passed else "failed"
        summary = QLabel(
            f"The check {verdict}: the largest difference between the re-derived and the "
            f"model's own attention probabilities is {check.max_abs_error:.3e} "
            f"(tolerance {check.tolerance:g}), over {len(check.layer_errors)} layers × "
            f"{check.head_errors.shape[1]} heads."
        )
        summary.setWordWrap(True)
        layout.addWidget(summary)
        self.table = QTableWidget(len(check.layer_errors), 3)
        self.table.setHorizontalHeaderLabels(["layer", "max abs error", "worst head"])
        self.table.verticalHeader().setVisible(False)
        for layer, err in enumerate(check.layer_errors):
            worst = int(check.head_errors[layer].argmax())
            for col, text in enumerate((str(layer), f"{err:.3e}", f"head {worst}")):
                item = QTableWidgetItem(text)
                self.table.setItem(layer, col, item)
        self.table.resizeColumnsToContents()
        self.table.horizontalHeader().setStretchLastSection(True)
        layout.addWidget(self.table)
        buttons = QDialogButtonBox(QDialogButtonBox.StandardButton.Close)
        buttons.rejected.connect(self.reject)
        buttons.accepted.connect(self.accept)
        layout.addWidget(buttons)
        self.resize(420, 300)
