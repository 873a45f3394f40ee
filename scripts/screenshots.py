"""Save screenshots of the window's main states into ``docs/`` (demo model).

    xvfb-run -s "-screen 0 1920x1080x24" python scripts/screenshots.py [--out docs]
    QT_QPA_PLATFORM=offscreen python scripts/screenshots.py [--out docs]   # without an X server

States: the demo text with the footer shortcut caught (evidence strip + shortcut report), a
text set filtered to the model's mistakes, compare mode (the same message without its footer),
and the re-derivation check's per-layer dialog. Each window state is saved at 1920 × 1080
(``window-demo.png``, ...) and at a laptop's 1366 × 768 (``window-demo-1366x768.png``, ...).
The sample text set is ``sample_sentences/coop_messages.jsonl`` when it exists, otherwise it is
generated the same way (``scripts.demo.generate.write_samples``) into a temporary folder.
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time
from collections.abc import Callable
from pathlib import Path

if not os.environ.get("DISPLAY"):
    os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")
ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

import numpy as np  # noqa: E402
from PySide6.QtCore import QSettings, Qt  # noqa: E402
from PySide6.QtWidgets import QApplication  # noqa: E402

from viewer.gui.app import application  # noqa: E402
from viewer.gui.window import MainWindow  # noqa: E402
from viewer.session.analysis import per_head_link  # noqa: E402
from viewer.session.controller import DEMO_TEXT  # noqa: E402

SIZES = ((1920, 1080, ""), (1366, 768, "-1366x768"))
WITHOUT_FOOTER = DEMO_TEXT.replace(" [via portal]", "")


WINDOW: MainWindow | None = None


def wait(condition: Callable[[], bool], timeout: float = 600.0, what: str = "") -> None:
    end = time.monotonic() + timeout
    while not condition():
        QApplication.processEvents()
        time.sleep(0.02)
        if WINDOW is not None and WINDOW.errors:
            raise SystemExit(f"screenshots: error while waiting for {what}: {WINDOW.errors}")
        if time.monotonic() > end:
            status = WINDOW.status_label.text() if WINDOW is not None else ""
            raise SystemExit(f"screenshots: timed out waiting for {what} (status: {status})")


def settle(window: MainWindow, seconds: float = 0.6) -> None:
    end = time.monotonic() + seconds
    while time.monotonic() < end:
        QApplication.processEvents()
        time.sleep(0.02)
    wait(lambda: all(pane.idle for pane in window.figure_panes), what="the panes' frames")
    QApplication.processEvents()


def run(window: MainWindow, text: str, what: str) -> None:
    """Run ``text`` and wait for its analysis and evidence (a new run, not the last one)."""
    old = window.state.analysis
    window.run_text(text)
    wait(lambda: window.state.analysis is not old and window.state.evidence is not None, what=what)


def sample_set(tmp: Path) -> Path:
    shipped = ROOT / "sample_sentences" / "coop_messages.jsonl"
    if shipped.is_file():
        return shipped
    from scripts.demo.generate import DEFAULT_SEED, build_dataset, write_samples

    return write_samples(build_dataset(DEFAULT_SEED), tmp)[0]


def shoot(window: MainWindow, out: Path, name: str) -> Path:
    settle(window)
    path = out / name
    window.grab().save(str(path))
    print(path)
    return path


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--out", type=Path, default=ROOT / "docs")
    args = parser.parse_args(argv)
    args.out.mkdir(parents=True, exist_ok=True)
    application()
    for width, height, suffix in SIZES:
        shoot_all(args.out, (width, height), suffix, dialog=not suffix)
    return 0


def shoot_all(out: Path, size: tuple[int, int], suffix: str, dialog: bool) -> None:
    """Every window state at ``size``, saved as ``<name><suffix>.png``."""
    tmp = Path(tempfile.mkdtemp(prefix="headlight-shots-"))

    def px(height: int) -> int:  # a dock height chosen at 1,000 pixels, scaled to this window
        return int(height * size[1] / 1000)

    def name(stem: str) -> str:
        return f"{stem}{suffix}.png"

    settings = QSettings(str(tmp / "settings.ini"), QSettings.Format.IniFormat)
    window = MainWindow(settings=settings, config_dir=tmp, restore_geometry=False)
    global WINDOW
    WINDOW = window
    window.resize(*size)
    window.show()
    window.start(restore_last=False)
    wait(lambda: window.canvases_ready and window.state.evidence is not None, what="demo run")
    s = window.state

    # 1. the demo message: routed to billing, the footer lit in the evidence strip, and the
    #    shortcut report over the sample set with the footer's words on top
    window.open_textset(str(sample_set(tmp)))
    wait(lambda: s.textset is not None, what="text set")
    window.search_shortcuts()
    wait(lambda: s.shortcuts is not None, what="shortcut search")
    run(window, DEMO_TEXT, "demo evidence")
    rec = s.analysis.recording
    portal = rec.tokens.index("portal") if "portal" in rec.tokens else rec.n_tokens - 2
    # show the head that links the summary token most strongly to the footer's word
    links = per_head_link(s.analysis, rec.summary_index(), portal)
    layer, head = divmod(int(np.argmax(links)), rec.n_heads)
    s.select_head(layer, head)
    s.select_tokens(rec.summary_index(), portal)
    window.shortcut_dock.raise_()
    window.resizeDocks([window.shortcut_dock], [px(260)], Qt.Orientation.Vertical)
    shoot(window, out, name("window-demo"))

    # 2. the insertion tests of the report's top words and the fixation plot
    window.run_insertions()
    wait(lambda: s.insertions is not None, what="insertion tests")
    shoot(window, out, name("window-insertion"))
    s.select_word("portal")
    window.fixation_dock.raise_()
    window.resizeDocks([window.fixation_dock], [px(330)], Qt.Orientation.Vertical)
    shoot(window, out, name("window-fixation"))
    window.resizeDocks([window.fixation_dock], [px(260)], Qt.Orientation.Vertical)

    # 3. the text set, mistakes only, one mistake selected
    window.textset_dock.raise_()
    s.select_word(None)
    s.set_mistakes_only(True)
    rows = window.textset_pane.rows_shown
    if rows:
        old = s.analysis
        s.select_item(rows[0])
        wait(lambda: s.analysis is not old and s.evidence is not None, what="mistake run")
    s.set_scope("set")
    s.set_metric("special")
    pairs = ROOT / "sample_sentences" / "coop_links.jsonl"
    if pairs.is_file():  # the links pane's per-head accuracy over the link pairs
        window.open_pairs(str(pairs))
        wait(lambda: s.link_pairs is not None, what="link pairs")
    shoot(window, out, name("window-textset"))

    # 4. compare: the demo message against itself without the footer
    window.links.view_box.setCurrentIndex(0)
    window.resizeDocks([window.textset_dock], [px(170)], Qt.Orientation.Vertical)
    s.set_mistakes_only(False)
    s.set_scope("text")
    s.set_metric("entropy")
    run(window, DEMO_TEXT, "demo run again")
    s.set_compare_target(("text", WITHOUT_FOOTER))
    window.run_compare()
    wait(lambda: s.compare is not None, what="compare run")
    s.select_head(0, 1)
    shoot(window, out, name("window-compare"))

    # 5. the check badge's per-layer dialog (one size: it is a dialog of its own)
    if dialog:
        window.badge.open_details()
        settle(window)
        path = out / "check-dialog.png"
        window.badge.dialog.grab().save(str(path))
        print(path)
        window.badge.dialog.close()
    window.close()


if __name__ == "__main__":
    raise SystemExit(main())
