"""The window's orchestration without a window: a fake worker and view drive the controller.

The worker here runs nothing: it records what was submitted, and the test plays the part of
the worker thread by handing results back through ``Controller.finished``.
"""

from __future__ import annotations

from pathlib import Path

from viewer.session import jobs
from viewer.session import session_file as sessions
from viewer.session.controller import DEMO_TEXT, Controller
from viewer.session.state import ModelInfo, Selection


class FakeWorker:
    def __init__(self) -> None:
        self.submitted: list[tuple[str, object, tuple]] = []
        self.cancelled: list[str | None] = []
        self.busy = False

    def submit(self, name, fn, *args, replace=True):
        self.submitted.append((name, fn, args))

    def cancel(self, name=None, keep=()):
        self.cancelled.append(name)

    def running_jobs(self):
        return [k for k, _, _ in self.submitted]

    def names(self) -> list[str]:
        return [k for k, _, _ in self.submitted]


class FakeView:
    def __init__(self) -> None:
        self.text = ""
        self.errors: list[str] = []
        self.status: list[str] = []
        self.panels: list[str] = []
        self.opened: list[tuple[str, bool]] = []
        self.timers: list = []
        self.evidence = True

    def show_error(self, message):
        self.errors.append(message)

    def set_status(self, text):
        self.status.append(text)

    def editor_text(self):
        return self.text

    def set_editor_text(self, text):
        self.text = text

    def model_opening(self, folder):
        pass

    def model_opened(self, info, remember):
        self.opened.append((info.folder, remember))
        self.label = info

    def model_not_opened(self, info):
        self.label = info

    def show_panel(self, name):
        self.panels.append(name)

    def evidence_after_runs(self):
        return self.evidence

    def later(self, msecs, fn):
        self.timers.append(fn)

    def figures_ready(self, seconds):
        pass

    def card_written(self, path):
        pass


def info(folder: str = "/m") -> ModelInfo:
    return ModelInfo(folder, "m", "BERT", 2, 4, ("a", "b"), "classifier", 64)


def make():
    state, worker, view = Selection(), FakeWorker(), FakeView()
    return Controller(state, worker, view), state, worker, view


def test_start_opens_the_demo_with_its_text_and_runs_it():
    c, state, worker, view = make()
    c.start()
    assert worker.names() == ["figures", "open"]
    assert worker.submitted[1][2] == ("main", str(jobs.demo_folder()), None)
    assert view.text == DEMO_TEXT
    c.finished("open", info(str(jobs.demo_folder())))
    assert state.model is not None and view.opened == [(str(jobs.demo_folder()), False)]
    assert worker.names()[-1] == "run" and worker.submitted[-1][2] == ("main", DEMO_TEXT, None)


def test_a_run_without_a_model_or_text_is_refused_with_one_line():
    c, state, worker, view = make()
    c.run_text("hello")
    assert view.errors and "no model" in view.errors[-1]
    c.finished("open", info())
    c.run_text("   ")
    assert "empty" in view.errors[-1]
    c.run_text("the chain \ud800 slips")  # pasted half of a UTF-16 pair: not Unicode text
    assert "lone surrogate" in view.errors[-1] and "\n" not in view.errors[-1]
    assert "run" not in worker.names()


def test_a_failed_or_cancelled_open_gives_the_label_back_to_the_open_model():
    c, state, worker, view = make()
    c.open_model("/a")
    worker.submitted.clear()  # the worker has delivered the job
    c.failed("open", "model folder not found: /a")
    assert view.label is None  # no model was open before
    c.open_model("/m")
    worker.submitted.clear()
    c.finished("open", info("/m"))
    c.open_model("/b", run_after=True)
    worker.submitted.clear()
    c.failed("open", "config.json in /b is not valid JSON")
    assert view.label is state.model and view.label.folder == "/m"
    assert c._after_open == []
    c.open_model("/c")
    c.open_model("/d")  # replaces /c: the cancelled /c must not reset the label of /d's opening
    view.label = "opening"
    worker.submitted = [s for s in worker.submitted if s[2][1] == "/d"]
    c.cancelled("open")
    assert view.label == "opening"
    worker.submitted.clear()
    c.cancelled("open")
    assert view.label is state.model


class _Rec:
    n_tokens, n_layers, n_heads, notes = 5, 2, 4, ()

    def summary_index(self) -> int:
        return 0


class _Analysis:
    def __init__(self) -> None:
        self.recording = _Rec()
        self.seconds = 0.1


def test_the_follow_up_starts_once_when_the_grid_has_painted_the_run():
    c, state, worker, view = make()
    c.finished("open", info())
    a = _Analysis()
    c.finished("run", a)
    assert state.analysis is a and state.source == 0  # the summary token is the first source
    c.painted(object())  # another recording: not this run's first paint
    assert "summary" not in worker.names()
    c.painted(a.recording)
    assert worker.names().count("summary") == 1 and worker.names().count("evidence") == 1
    view.timers[-1]()  # the fallback timer fires later: nothing is started twice
    c.painted(a.recording)
    assert worker.names().count("summary") == 1


def test_evidence_for_an_older_run_is_dropped():
    c, state, worker, view = make()
    c.finished("open", info())
    old, new = _Analysis(), _Analysis()
    c.finished("run", old)
    c.finished("run", new)

    class Ev:
        recording = old.recording
        notes = ()

    c.finished("evidence", Ev())
    assert state.evidence is None


def test_restoring_a_session_opens_its_model_then_its_files_and_text(tmp_path):
    c, state, worker, view = make()
    session = sessions.Session(
        model="/ckpt",
        text="a text",
        text_set=str(tmp_path / "t.jsonl"),
        item=2,
        link_pairs=str(tmp_path / "p.jsonl"),
        selection={"layer": 1, "head": None, "metric": "distance"},
        notes="n",
    )
    c.restore_session(session)
    assert worker.names() == ["open"] and worker.submitted[0][2] == ("main", "/ckpt", None)
    assert view.text == "a text" and state.notes == "n"
    c.finished("open", info("/ckpt"))
    assert worker.names() == ["open", "textset", "pairs", "run"]
    assert worker.submitted[1][2] == ("main", str(Path(tmp_path / "t.jsonl")))


def test_unknown_job_names_and_failures():
    c, state, worker, view = make()
    c.finished("hold", None)  # a job that only needed to run
    c.failed("open", "config.json in /x is not valid JSON")
    assert view.errors == ["config.json in /x is not valid JSON"]


BAD_SESSIONS = {
    "a 5000-digit integer": '{"format": "headlight-session", "version": ' + "9" * 5000 + "}",
    "100k-deep nesting": '{"format": "headlight-session", "x": ' + "[" * 100_000 + "]" * 100_000 + "}",
    "bytes that are not text": b"\xff\xfe\x00garbage\x80",
    "not a session": '{"format": "something-else"}',
    "a field of the wrong type": '{"format": "headlight-session", "version": 1, "selection": {"layer": -3}}',
}


def test_an_unreadable_last_session_opens_the_demo_and_is_kept_aside(tmp_path):
    """Whatever the last-session file holds, start-up opens the demo with a one-line note,
    and the file is moved aside with its bytes intact (not deleted, not left to be saved over)."""
    for name, content in BAD_SESSIONS.items():
        folder = tmp_path / name.replace(" ", "-")
        folder.mkdir()
        last = folder / "last-session.json"
        raw = content if isinstance(content, bytes) else content.encode("utf-8")
        last.write_bytes(raw)
        c, state, worker, view = make()
        c.start(last_session=last)
        assert worker.names() == ["figures", "open"], name
        assert worker.submitted[1][2] == ("main", str(jobs.demo_folder()), None), name
        assert view.text == DEMO_TEXT
        (note,) = view.status
        assert "\n" not in note and note.startswith("last session not restored") and "demo" in note, note
        assert not last.exists()
        (kept,) = folder.glob("last-session.unreadable-*.json")
        assert kept.read_bytes() == raw and kept.name in note, name


class _Tally:
    def __init__(self, flips: int, tried: int) -> None:
        self.flips, self.tried = flips, tried

    def entry(self, position):
        return {"flips": self.flips, "tried": self.tried, "flip_rate": self.flips / self.tried}


class _Inserted:
    def __init__(self, phrase: str, flips: int, tried: int = 56) -> None:
        self.phrase, self.tally, self.mechanism = phrase, _Tally(flips, tried), None

    def headline(self) -> str:
        return f"'{self.phrase}' {self.tally.flips} of {self.tally.tried}"


def test_the_insertion_test_takes_the_users_own_word_first_and_the_mechanism_check_the_selected_heads():
    c, state, worker, view = make()
    c.finished("open", info())
    c.run_insertions(["portal"], own="  my  phrase ")
    assert "insertions" not in worker.names() and view.errors  # no text set yet
    state.set_textset(object())
    c.run_insertions(["portal"], own="  my  phrase ")  # no search: only the user's own phrase
    assert worker.submitted[-1][2][2:] == (None, ("my phrase",), "my phrase")
    report = object()
    state.set_shortcuts(report)
    c.run_insertions(["portal", "via portal", "my phrase"], own="my phrase")
    assert worker.submitted[-1][2][2:] == (report, ("my phrase", "portal", "via portal"), "my phrase")
    results = {"portal": _Inserted("portal", 30), "via portal": _Inserted("[via portal]", 55)}
    c.finished("insertions", (report, results, None, None))
    assert view.status[-1] == "insertion test: '[via portal]' 55 of 56"  # the lead: the highest rate
    c.finished("insertions", (object(), {}, None, None))  # an older search's: not shown
    assert set(state.insertions) == {"portal", "via portal"}

    state.select_head(1, None)
    c.mechanism_check()
    name, _fn, args = worker.submitted[-1]
    assert name == "mechanism" and args[3] == "via portal" and args[5] == ((1, 0), (1, 1), (1, 2), (1, 3))
    state.select_head(0, 2)
    c.mechanism_check(own="portal")
    assert worker.submitted[-1][2][3:] == ("portal", results["portal"], ((0, 2),))
    checked = _Inserted("portal", 30)
    checked.tally = results["portal"].tally
    c.finished("mechanism", (report, "portal", checked))
    assert state.insertions["portal"] is checked and view.status[-1].startswith("mechanism check: ")
    stale = _Inserted("portal", 30)  # its test was replaced meanwhile
    c.finished("mechanism", (report, "portal", stale))
    assert state.insertions["portal"] is checked
