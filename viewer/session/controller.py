"""The window's orchestration without Qt: which jobs a user action starts, where results go.

``Controller`` owns no widget. It is given the one ``Selection`` state, a *worker* that runs
jobs off the GUI thread, and a *view* (the window) for the few things only a window can do:
show an error dialog, write the status line, read and fill the text box, raise a dock, run
something later. The window forwards the worker's messages to ``finished``, ``failed`` and
``cancelled`` on the GUI thread, and calls the action methods from its menus and keys.

Worker (``viewer.gui.worker.Worker`` in the window; anything with these methods in a test):
``submit(name, fn, *args, replace=True)``, ``cancel(name=None, keep=())``,
``running_jobs()`` and ``busy``. A finished job named ``k`` is handled by ``_done_k``.

A run arrives in two steps (``viewer.session.analysis``): the recording first, so the pair
grid can be painted at once; then — when the pair grid has painted it (``painted``) or after
``FOLLOW_UP_MS`` — the re-derivation check and head metrics, and the evidence.
"""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path
from typing import Any, Protocol

from viewer.errors import HeadlightError
from viewer.safejson import check_text
from viewer.session import jobs
from viewer.session import session_file as sessions
from viewer.session.preload import load_figures
from viewer.session.state import ModelInfo, Selection

DEMO_TEXT = (
    "Hi, the rear derailleur on my cargo bike keeps slipping and the chain jumps "
    "when I climb. Could someone at the Oldmere depot look at it on Tuesday? "
    "Thanks, Wren. [via portal]"
)
# The check, head metrics and evidence of a run start once the pair grid has painted it (numpy
# work on the worker would take the render thread's core and GIL meanwhile), or after this long.
FOLLOW_UP_MS = 400


class View(Protocol):
    """What the controller needs from a window."""

    def show_error(self, message: str) -> None: ...
    def set_status(self, text: str) -> None: ...
    def editor_text(self) -> str: ...
    def set_editor_text(self, text: str) -> None: ...
    def model_opening(self, folder: str) -> None: ...
    def model_opened(self, info: ModelInfo, remember: bool) -> None: ...
    def model_not_opened(self, info: ModelInfo | None) -> None: ...  # the open model stays (or none)
    def show_panel(self, name: str) -> None: ...  # "textset", "shortcuts", "compare"
    def evidence_after_runs(self) -> bool: ...
    def later(self, msecs: int, fn: Callable[[], None]) -> None: ...
    def ask_base_model(self, adapter: str, message: str) -> str | None: ...
    def figures_ready(self, seconds: float) -> None: ...
    def card_written(self, path: str) -> None: ...


class Controller:
    def __init__(self, state: Selection, worker: Any, view: View) -> None:
        self.state = state
        self.worker = worker
        self.view = view
        self._after_open: list[Callable[[], None]] = []
        self._remember = True
        self._pending_selection: dict[str, Any] | None = None
        self._pending_item: int | None = None
        self._follow_up: Any = None  # a run whose check and evidence wait for its first paint
        self._figures_requested = False

    # -- start-up -------------------------------------------------------------------------------
    def start(
        self, model: str | None = None, text: str | None = None, last_session: Path | None = None
    ) -> None:
        """Load the drawing library, then a model: ``model``, else the last session (when
        ``last_session`` is a file), else the embedded demo with its demo text."""
        self.load_figures()
        if text:
            self.view.set_editor_text(text)
        if model:
            self.open_model(model, run_after=bool(text))
            return
        if last_session is not None and last_session.is_file():
            try:
                self.restore_session(sessions.load(last_session))
                return
            except HeadlightError as exc:  # a bad last session must not stop start-up
                self.view.set_status(self._set_aside(last_session, exc))
        demo = jobs.demo_folder()
        if (demo / "config.json").is_file():
            if not text:
                self.view.set_editor_text(DEMO_TEXT)
            self.open_model(str(demo), run_after=True, remember=False)
        else:
            self.view.set_status("no demo model in this installation; open a model folder (Ctrl+O)")

    @staticmethod
    def _set_aside(path: Path, problem: HeadlightError) -> str:
        """Move an unreadable last session aside (kept, not deleted); the one-line note."""
        try:
            kept = f"kept as {sessions.set_aside(path).name}"
        except HeadlightError as exc:
            kept = str(exc)
        return f"last session not restored ({problem}); {kept}; opening the demo"

    def load_figures(self) -> None:
        """Queue the matplotlib import as the worker's first job (once)."""
        if not self._figures_requested:
            self._figures_requested = True
            self.worker.submit("figures", load_figures, replace=False)

    def _done_figures(self, seconds: float) -> None:
        self.view.figures_ready(seconds)

    # -- models ---------------------------------------------------------------------------------
    def open_model(
        self, folder: str, *, run_after: bool = False, remember: bool = True, base: str | None = None
    ) -> None:
        """Open a model folder, or an adapter folder (on ``base`` when given)."""
        self.worker.cancel("run")
        self.worker.cancel("evidence")
        self._after_open = [self.run_current] if run_after else []
        self._remember = remember
        self.view.model_opening(str(folder))
        self.worker.submit("open", jobs.open_model, "main", str(folder), None if base is None else str(base))

    def _done_open(self, info: ModelInfo | jobs.BaseNeeded) -> None:
        if isinstance(info, jobs.BaseNeeded):
            base = self.view.ask_base_model(info.folder, info.message)
            if not base:
                self._after_open.clear()
                self.view.model_not_opened(self.state.model)
                self.view.show_error(info.message)
                return
            self.worker.submit("open", jobs.open_model, "main", info.folder, str(base))
            return
        self.state.set_model(info)
        self.view.model_opened(info, self._remember)
        self.view.set_status(f"opened {info.name}")
        for note in info.notes:
            self.view.set_status(note)
        todo, self._after_open = self._after_open, []
        for fn in todo:
            fn()

    def _open_ended(self) -> None:
        """An open failed or was cancelled: unless a newer open is on its way, the model label
        names the model still open (or none), not the folder that did not open."""
        if "open" not in self.worker.running_jobs():
            self._after_open.clear()
            self.view.model_not_opened(self.state.model)

    # -- runs -----------------------------------------------------------------------------------
    def run_current(self) -> None:
        """Record the text box's text."""
        self.run_text(self.view.editor_text(), label=None)

    def run_text(self, text: str, label: str | None = None) -> None:
        if self.state.model is None:
            if "open" in self.worker.running_jobs():
                self._after_open = [self.run_current]
                return
            self.view.show_error("no model is open yet; open a model folder first (Ctrl+O)")
            return
        if not text.strip():
            self.view.show_error("the text is empty; type or paste a text first")
            return
        try:
            check_text(text, "the text")  # a lone surrogate (pasted) no tokenizer can encode
        except HeadlightError as exc:
            self.view.show_error(str(exc))
            return
        if self.view.editor_text() != text:
            self.view.set_editor_text(text)
        self.worker.cancel("evidence")
        self.worker.cancel("summary")
        self.state.set_text(text)
        self.worker.submit("run", jobs.run_text, "main", text, label)

    def _done_run(self, analysis) -> None:
        self.state.set_analysis(analysis)
        self._follow_up = analysis
        self.view.later(FOLLOW_UP_MS, lambda: self._start_follow_up(analysis))
        pending, self._pending_selection = self._pending_selection, None
        if pending:
            self.apply_selection(pending)
        elif self.state.source is None:
            # Start the links pane from the token the prediction is read from ([CLS]).
            self.state.select_tokens(analysis.recording.summary_index(), None)
        rec = analysis.recording
        note = f" · {rec.notes[-1]}" if rec.notes else ""
        self.view.set_status(f"recorded {rec.n_tokens} tokens in {analysis.seconds:.2f} s{note}")

    def painted(self, recording) -> None:
        """The pair grid has painted ``recording``: time for the run's second step."""
        a = self._follow_up
        if a is not None and recording is a.recording:
            self._start_follow_up(a)

    def _start_follow_up(self, analysis) -> None:
        """The second step of a run: check and head metrics, then (if on) the evidence."""
        if self._follow_up is not analysis:
            return  # started already, or a newer run replaced it
        self._follow_up = None
        self.worker.submit("summary", jobs.summarise_run, analysis)
        if self.view.evidence_after_runs():
            self.run_evidence()

    def _done_summary(self, analysis) -> None:
        current = self.state.analysis
        if current is not None and current.recording is analysis.recording:
            self.state.set_analysis(analysis)

    def run_evidence(self) -> None:
        """Compute the evidence for the current run (once per run)."""
        analysis = self.state.analysis
        if analysis is None or self.state.evidence is not None:
            return
        self.worker.submit("evidence", jobs.run_evidence, "main", analysis)

    def _done_evidence(self, evidence) -> None:
        current = self.state.analysis
        if current is None or evidence.recording is not current.recording:
            return  # a newer run has arrived meanwhile
        self.state.set_evidence(evidence)
        if evidence.notes:
            self.view.set_status(evidence.notes[0])

    def knock_out_span(self, first: int, last: int) -> None:
        """Knock tokens ``first``..``last`` of the current run out together (docs/definitions.md,
        "Flat knockout"); the evidence strip then shows the drop."""
        ev = self.state.evidence
        if ev is None or ev.target is None:
            self.view.show_error("wait for the evidence strip; a span is knocked out of its prediction")
            return
        self.worker.submit("span", jobs.run_span_knockout, "main", ev, int(first), int(last))

    def _done_span(self, evidence) -> None:
        current = self.state.evidence
        if current is None or evidence.recording is not current.recording:
            return  # a newer run has arrived meanwhile
        self.state.set_evidence(evidence)
        self.view.set_status(evidence.span.line())

    def cancel(self) -> None:
        self.worker.cancel(keep=("figures",))
        self._after_open.clear()
        self.view.set_status("cancelling…")

    # -- text sets, link pairs, shortcut search ---------------------------------------------------
    def open_textset(self, path) -> None:
        """Read a text set: a path (its default columns), or a ``TextSource`` naming them."""
        if self.state.model is None:
            self.view.show_error("open a model before a text set: the list shows its predictions")
            return
        self.worker.submit("textset", jobs.run_textset, "main", path if hasattr(path, "path") else str(path))
        self.view.show_panel("textset")

    def _done_textset(self, result) -> None:
        self.state.set_textset(result)
        pending, self._pending_item = self._pending_item, None
        if pending is not None and pending < len(result.rows):
            self.state.select_item(pending)
        acc = result.accuracy
        self.view.set_status(
            f"text set: {len(result.rows)} texts" + (f", accuracy {acc:.1%}" if acc is not None else "")
        )

    def item_chosen(self, index: int | None) -> None:
        """A text-set row was selected: run its text (with its label)."""
        ts = self.state.textset
        if index is None or ts is None or index >= len(ts.rows):
            return
        row = ts.rows[index]
        self.run_text(row.text, row.label)

    def open_pairs(self, path: str) -> None:
        if self.state.model is None:
            self.view.show_error("open a model before a link-pairs file")
            return
        self.worker.submit("pairs", jobs.run_link_pairs, "main", str(path))

    def _done_pairs(self, run) -> None:
        self.state.set_link_pairs(run)
        layer, head, acc = run.report.best()
        self.view.set_status(
            f"link pairs: best layer {layer} · head {head} ({acc:.2f}), "
            f"nearest baseline {run.report.nearest_baseline:.2f}"
        )

    def search_shortcuts(self, phrases: bool = True, exhaustive: bool = False) -> None:
        ts = self.state.textset
        if ts is None:
            self.view.show_error("open a text set first; the shortcut search knocks words out of it")
            return
        self.worker.submit("shortcuts", jobs.run_shortcuts, "main", ts, bool(phrases), bool(exhaustive))
        self.view.show_panel("shortcuts")

    def _done_shortcuts(self, report) -> None:
        self.state.set_shortcuts(report)
        words = len(report.words.ranking())
        phrases = f" and {len(report.phrases.ranking())} phrases" if report.phrases.texts else ""
        self.view.set_status(f"shortcut report: {words} words{phrases}")

    def run_insertions(self, words, own: str | None = None) -> None:
        """Insertion tests for the shortcut report's ``words`` and the user's ``own`` word or
        phrase, first (on request: one pass over the text set per word and position). ``own``
        needs a text set but no search: its class is then found by its knockout."""
        ts, report = self.state.textset, self.state.shortcuts
        own = " ".join(own.split()) if own else None
        if ts is None or (report is None and not own):
            self.view.show_error(
                "search the text set for shortcuts first, or type a word or phrase to insert; "
                "the insertion test takes the report's top words"
            )
            return
        words = tuple(dict.fromkeys([*([own] if own else []), *(words if report is not None else ())]))
        if not words:
            self.view.show_error("the shortcut report has no words to test")
            return
        self.worker.submit("insertions", jobs.run_insertions, "main", ts, report, words, own)

    def _done_insertions(self, done) -> None:
        from viewer.reports.insertion import lead_insertion

        report, results, own, failed = done
        if report is not self.state.shortcuts:
            return  # a newer search replaced the report these words came from
        self.state.set_insertions(results)
        if failed:
            self.view.show_error(failed)
        lead = lead_insertion(results, own)
        if lead is None:
            self.view.set_status("insertion tests: no top word points to a class")
            return
        self.view.set_status(f"insertion test: {results[lead].headline()}")

    def mechanism_check(self, own: str | None = None) -> None:
        """The insertion test of the lead word (``own`` when it has a result) rerun with the
        selected head knocked out, or every head of the selected layer when the head mean is
        selected (docs/definitions.md, "Mechanism check")."""
        from viewer.reports.insertion import lead_insertion

        insertions = self.state.insertions or {}
        word = lead_insertion(insertions, " ".join(own.split()) if own else None)
        if word is None or self.state.textset is None:
            self.view.show_error(
                "run the insertion test first; the mechanism check reruns it without the selected heads"
            )
            return
        layer, head = self.state.layer, self.state.head
        heads = tuple((layer, h) for h in range(self.state.n_heads)) if head is None else ((layer, head),)
        self.worker.submit(
            "mechanism",
            jobs.run_mechanism,
            "main",
            self.state.textset,
            self.state.shortcuts,
            word,
            insertions[word],
            heads,
        )

    def _done_mechanism(self, done) -> None:
        report, word, result = done
        shown = (self.state.insertions or {}).get(word)
        if report is not self.state.shortcuts or shown is None or shown.tally is not result.tally:
            return  # a newer search or insertion test replaced the one checked
        self.state.set_insertions({**self.state.insertions, word: result})
        self.view.set_status(f"mechanism check: {result.headline()}")

    # -- compare --------------------------------------------------------------------------------
    def run_compare(self) -> None:
        target = self.state.compare_target
        if target is None:
            self.view.show_error("give a second text or a second checkpoint folder to compare with")
            return
        kind, value = target
        if kind == "text":
            if self.state.model is None:
                self.view.show_error("no model is open yet; open a model folder first (Ctrl+O)")
                return
            self.worker.submit("compare", jobs.run_text, "main", value, None, "second text", True)
        else:
            text = self.state.text or self.view.editor_text()
            if not text.strip():
                self.view.show_error("run a text first; the second checkpoint is compared on it")
                return
            self.worker.submit("compare-open", jobs.open_model, "compare", value)
            self.worker.submit("compare", jobs.run_text, "compare", text, None, "", True, replace=False)
        self.view.show_panel("compare")

    def _done_compare_open(self, info: ModelInfo | jobs.BaseNeeded) -> None:
        if isinstance(info, jobs.BaseNeeded):
            self.worker.cancel("compare")
            self.view.show_error(
                f"{info.message} (open the compared adapter as the main model first to choose its base)"
            )
            return
        model = self.state.model
        if model is not None and (info.n_layers, info.n_heads) != (model.n_layers, model.n_heads):
            self.view.set_status(
                f"compared checkpoint {info.name} has a different shape; the difference view is off"
            )

    def _done_compare(self, analysis) -> None:
        self.state.set_compare(analysis)
        self.state.set_difference(True)
        self.view.set_status("compare: head map shows compared − current")

    def clear_compare(self) -> None:
        self.state.set_compare(None)

    # -- card export ----------------------------------------------------------------------------
    def export_card(self, texts: str, pairs: str | None, out: str, force: bool) -> None:
        self.worker.submit(
            "card", jobs.card_job, "main", str(texts), str(pairs) if pairs else None, str(out), bool(force)
        )
        self.view.set_status(f"writing the model-card folder {out}…")

    def _done_card(self, path: str) -> None:
        self.view.card_written(path)

    # -- sessions -------------------------------------------------------------------------------
    def capture_session(self) -> sessions.Session:
        return sessions.capture(self.state)

    def restore_session(self, session: sessions.Session) -> None:
        """Open the session's model, run its text and re-apply its selection when it arrives."""
        self.view.set_editor_text(session.text)
        self.state.set_notes(session.notes)
        compare = session.compare
        self.state.set_compare_target(None if compare is None else (compare["kind"], compare["value"]))
        self._pending_selection = dict(session.selection)
        self._pending_item = session.item
        if session.model is None:
            self.view.set_status("session restored (no model in it)")
            return
        follow: list[Callable[[], None]] = []
        if session.text_set:
            follow.append(lambda: self.open_textset(session.text_set))
        if session.link_pairs:
            follow.append(lambda: self.open_pairs(session.link_pairs))
        if session.text.strip():
            follow.append(self.run_current)
        self.open_model(session.model, base=session.base)
        self._after_open = follow

    def apply_selection(self, sel: dict[str, Any]) -> None:
        s = self.state
        layer = min(int(sel.get("layer") or 0), max(s.n_layers - 1, 0))
        head = sel.get("head")
        if head is not None and head >= s.n_heads:
            head = None
        s.select_head(layer, head)
        n = s.n_tokens
        source, target = sel.get("source"), sel.get("target")
        s.select_tokens(
            source if source is not None and source < n else None,
            target if target is not None and target < n else None,
        )
        s.set_metric(sel.get("metric", "entropy"))
        if sel.get("scope") == "set" and s.textset is not None:
            s.set_scope("set")
        s.set_mistakes_only(bool(sel.get("mistakes_only")))
        s.select_word(sel.get("word"))
        s.set_difference(bool(sel.get("difference")))

    def shutdown(self) -> None:
        """The window is closing: nothing more is started."""
        self._follow_up = None
        self._after_open.clear()

    # -- worker messages (GUI thread) -------------------------------------------------------------
    def finished(self, name: str, result: Any) -> None:
        handler = getattr(self, f"_done_{name.replace('-', '_')}", None)
        if handler is not None:  # jobs without a handler only needed to run
            handler(result)

    def failed(self, name: str, message: str) -> None:
        if name == "figures":
            self._figures_requested = False
        if name == "open":
            self._open_ended()
        self.view.show_error(message)

    def cancelled(self, name: str) -> None:
        if name == "open":
            self._open_ended()
        if not self.worker.busy:
            self.view.set_status(f"{name} cancelled")
