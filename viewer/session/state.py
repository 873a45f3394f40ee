"""The one selection state every pane observes and writes to (plain Python, no Qt).

Each field has an ``Event`` in ``state.events`` that fires only when the field's value really
changes (``viewer.session.events.same``). Panes receive the state in their constructor, connect to
the fields they draw, and write user input back through the methods below; they never call each
other. Results from the worker thread are stored here by the window, on the GUI thread.

Fields:

=============  ==========================================================================
model          ``ModelInfo`` of the open checkpoint, or None
text           the text of the current run
item           index of the selected text-set row, or None
analysis       ``TextAnalysis`` of the current text (recording, check, per-text metrics)
evidence       ``viewer.reports.evidence.Evidence`` of the current run, or None meanwhile
layer          selected layer (from 0)
head           selected head (from 0), or None for the layer's head mean
source         selected source (query) token, or None
target         selected target (key) token, or None
metric         head-map metric name (``HEAD_MAP_METRICS``)
scope          "text" (this text) or "set" (summaries over the text set)
textset        ``TextSetResult`` of the open text set, or None
mistakes_only  the text-set list shows only wrong predictions
compare_target what to compare with: ("text", a second text) or ("model", a folder), or None
compare        ``TextAnalysis`` of the compared text or checkpoint, or None
difference     the head map shows compare − current instead of the current text's metric
link_pairs     ``LinkPairsRun`` (file and ``LinkAccuracy``) of opened link pairs, or None
shortcuts      ``viewer.reports.shortcuts.ShortcutReport`` over the text set, or None
insertions     {word: ``viewer.reports.insertion.InsertionReport``} for the report's top words
word           the word selected in the shortcut report (filters the text-set list), or None
notes          free text saved with the session
=============  ==========================================================================
"""

from __future__ import annotations

from dataclasses import dataclass
from types import SimpleNamespace
from typing import Any

from viewer.session.events import Event, same

# name -> (label in the chooser, colour-bar label with units, explanation for the tooltip)
BLOCK_MODES = {"max": "block max", "mean": "block mean"}
"""How an overview pools a block of cells (docs/definitions.md, "Overview"), as the pane names it."""

HEAD_MAP_METRICS: dict[str, tuple[str, str, str]] = {
    "entropy": (
        "entropy",
        "entropy (0–1)",
        "mean attention entropy per query, divided by its maximum: 0 = all weight on one "
        "key, 1 = spread evenly over the visible keys",
    ),
    "distance": (
        "distance",
        "distance (tokens)",
        "mean number of tokens between a query and the keys it attends to",
    ),
    "special": (
        "special-token share",
        "weight on specials",
        "mean share of attention on special tokens such as [CLS] and [SEP]",
    ),
    "confidence": (
        "confidence",
        "largest weight",
        "mean of each query's largest attention weight (Voita et al. 2019)",
    ),
    "previous": ("previous token", "weight on previous", "mean attention on the token just before the query"),
    "same": ("own token", "weight on own token", "mean attention of a query on itself"),
    "next": (
        "next token",
        "weight on next",
        "mean attention on the token just after the query (not defined for causal models)",
    ),
    "link": (
        "link score",
        "link score",
        "attention from the source word's first sub-token summed over the target word's "
        "sub-tokens, in every head",
    ),
    "importance": (
        "head importance",
        "head importance",
        "|∂loss/∂gate| of each head for this prediction, normalised per layer (Michel et al. 2019)",
    ),
    "knockout": (
        "knockout effect",
        "Δ p(predicted)",
        "drop in the predicted class's probability when the head is knocked out",
    ),
}

FIELDS = (
    "model",
    "text",
    "item",
    "analysis",
    "evidence",
    "layer",
    "head",
    "source",
    "target",
    "metric",
    "scope",
    "textset",
    "mistakes_only",
    "compare_target",
    "compare",
    "difference",
    "link_pairs",
    "shortcuts",
    "insertions",
    "word",
    "notes",
)


@dataclass(frozen=True)
class ModelInfo:
    """What the GUI thread knows about an open checkpoint (the torch model stays in the worker)."""

    folder: str
    name: str
    family: str
    n_layers: int
    n_heads: int
    labels: tuple[str, ...]
    head_kind: str
    max_tokens: int
    notes: tuple[str, ...] = ()
    base: str | None = None  # the base model folder when ``folder`` is an adapter

    def describe(self) -> str:
        """The model line: name ("base + adapter" for an adapter), family, size, and how the
        weights were loaded when that is not as stored (e.g. "upcast from bfloat16 ...")."""
        kind = "classifier" if self.head_kind == "classifier" else self.head_kind
        loaded = "".join(f" · {n}" for n in self.notes if n.startswith("upcast from"))
        return f"{self.name} · {self.family} {kind} · {self.n_layers} layers × {self.n_heads} heads{loaded}"


class Selection:
    """Evented selection state; see the module docstring for the fields."""

    def __init__(self) -> None:
        self.events = SimpleNamespace(**{name: Event(name) for name in FIELDS})
        self._values: dict[str, Any] = {
            "model": None,
            "text": "",
            "item": None,
            "analysis": None,
            "evidence": None,
            "layer": 0,
            "head": 0,
            "source": None,
            "target": None,
            "metric": "entropy",
            "scope": "text",
            "textset": None,
            "mistakes_only": False,
            "compare_target": None,
            "compare": None,
            "difference": False,
            "link_pairs": None,
            "shortcuts": None,
            "insertions": None,
            "word": None,
            "notes": "",
        }

    # -- generic access -------------------------------------------------------------------
    def __getattr__(self, name: str) -> Any:
        values = self.__dict__.get("_values")
        if values is not None and name in values:
            return values[name]
        raise AttributeError(name)

    def _set(self, name: str, value: Any) -> bool:
        if same(self._values[name], value):
            return False
        self._values[name] = value
        getattr(self.events, name).emit(value)
        return True

    def snapshot(self) -> dict[str, Any]:
        """The selection fields that a session stores (plain values only)."""
        return {
            k: self._values[k]
            for k in (
                "layer",
                "head",
                "source",
                "target",
                "metric",
                "scope",
                "mistakes_only",
                "difference",
                "word",
            )
        }

    # -- sizes -----------------------------------------------------------------------------
    def _size(self, name: str) -> int:
        """``n_layers`` or ``n_heads`` of the current run, else of the open model, else 0."""
        a, m = self._values["analysis"], self._values["model"]
        if a is not None:
            return getattr(a.recording, name)
        return getattr(m, name) if m is not None else 0

    @property
    def n_layers(self) -> int:
        return self._size("n_layers")

    @property
    def n_heads(self) -> int:
        return self._size("n_heads")

    @property
    def n_tokens(self) -> int:
        a = self._values["analysis"]
        return a.recording.n_tokens if a is not None else 0

    # -- writers ---------------------------------------------------------------------------
    def set_model(self, info: ModelInfo | None) -> None:
        """A new checkpoint: everything recorded with the old one is dropped."""
        if same(self._values["model"], info):
            return
        self.set_analysis(None)
        self.set_compare(None)
        self._set("textset", None)
        self._set("item", None)
        self.set_shortcuts(None)
        self._set("link_pairs", None)
        self._set("model", info)
        self._clamp_head()

    def set_text(self, text: str) -> None:
        self._set("text", str(text))

    def set_analysis(self, analysis: Any) -> None:
        """Store a new run; keeps the layer/head and tokens when they still exist.

        An analysis of the same recording (the summarised second step of a run) keeps the
        evidence, which depends on the recording only.
        """
        old = self._values["analysis"]
        if same(old, analysis):
            return
        if old is None or analysis is None or old.recording is not analysis.recording:
            self._set("evidence", None)
        self._values["analysis"] = analysis
        if analysis is not None:
            n = analysis.recording.n_tokens
            for name in ("source", "target"):
                v = self._values[name]
                if v is not None and v >= n:
                    self._set(name, None)
        self._clamp_head()
        self.events.analysis.emit(analysis)

    def set_evidence(self, evidence: Any) -> None:
        self._set("evidence", evidence)

    def select_head(self, layer: int, head: int | None) -> None:
        """Select ``layer`` and ``head`` (None: the layer's head mean)."""
        layer = int(layer)
        if self.n_layers and not 0 <= layer < self.n_layers:
            raise ValueError(f"no layer {layer} in a model with {self.n_layers} layers")
        if head is not None:
            head = int(head)
            if self.n_heads and not 0 <= head < self.n_heads:
                raise ValueError(f"no head {head} in a model with {self.n_heads} heads")
        self._set("layer", layer)
        self._set("head", head)

    def move_head(self, step: int) -> None:
        """Next/previous head in the layer; the head mean sits after the last head."""
        n = self.n_heads
        if not n:
            return
        order = list(range(n)) + [None]
        pos = order.index(self._values["head"]) if self._values["head"] in order else 0
        self._set("head", order[max(0, min(len(order) - 1, pos + step))])

    def move_layer(self, step: int) -> None:
        n = self.n_layers
        if n:
            self._set("layer", max(0, min(n - 1, self._values["layer"] + step)))

    def select_tokens(self, source: int | None, target: int | None = None) -> None:
        """Select a source (query) token and optionally a target (key) token."""
        n = self.n_tokens
        for v in (source, target):
            if v is not None and not 0 <= int(v) < max(n, 1):
                raise ValueError(f"no token {v} in a text of {n} tokens")
        self._set("source", None if source is None else int(source))
        self._set("target", None if target is None else int(target))

    def set_metric(self, name: str) -> None:
        if name not in HEAD_MAP_METRICS:
            raise ValueError(f"unknown head-map metric {name!r}")
        self._set("metric", name)

    def set_scope(self, scope: str) -> None:
        if scope not in ("text", "set"):
            raise ValueError(f"unknown scope {scope!r}")
        self._set("scope", scope)

    def set_textset(self, result: Any) -> None:
        """A new text set (or none): what belonged to the old one goes (report, filters, row)."""
        if same(self._values["textset"], result):
            return
        self.set_shortcuts(None)
        self._set("word", None)
        self._set("item", None)
        if result is None:
            self._set("scope", "text")
        self._set("textset", result)

    def select_item(self, index: int | None) -> None:
        self._set("item", None if index is None else int(index))

    def set_mistakes_only(self, flag: bool) -> None:
        self._set("mistakes_only", bool(flag))

    def set_compare_target(self, target: tuple[str, str] | None) -> None:
        """("text", a second text) or ("model", a second checkpoint folder), or None."""
        if target is not None:
            kind, value = target
            if kind not in ("text", "model"):
                raise ValueError(f"unknown compare target {kind!r}")
            target = (kind, str(value))
        self._set("compare_target", target)

    def set_compare(self, analysis: Any) -> None:
        self._set("compare", analysis)
        if analysis is None:
            self._set("difference", False)

    def set_difference(self, flag: bool) -> None:
        self._set("difference", bool(flag) and self._values["compare"] is not None)

    def set_link_pairs(self, result: Any) -> None:
        self._set("link_pairs", result)

    def set_shortcuts(self, result: Any) -> None:
        """A new shortcut report; insertion results of the old one go with it."""
        if not same(self._values["shortcuts"], result):
            self._set("insertions", None)
        self._set("shortcuts", result)

    def set_insertions(self, results: Any) -> None:
        """Insertion tests of the report's top words: {word: InsertionReport}, or None."""
        self._set("insertions", None if results is None else dict(results))

    def select_word(self, word: str | None) -> None:
        self._set("word", word or None)

    def set_notes(self, notes: str) -> None:
        self._set("notes", str(notes))

    def _clamp_head(self) -> None:
        if self.n_layers:
            self._set("layer", max(0, min(self.n_layers - 1, self._values["layer"])))
        head = self._values["head"]
        if head is not None and self.n_heads and head >= self.n_heads:
            self._set("head", self.n_heads - 1)
