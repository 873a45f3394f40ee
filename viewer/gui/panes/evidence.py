"""The evidence-strip pane: per-token evidence for the prediction, one row per piece of evidence.

Each row is scaled to its own largest value; ρ at the right is the row's rank agreement with
knockout. Click a token to make it the source token; drag across tokens to knock them out
together (``span_chosen``; docs/definitions.md, "Flat knockout"); wheel to zoom along the text.
"""

from __future__ import annotations

from PySide6.QtCore import Signal

from viewer.figures.blit import Blitter
from viewer.figures.zoom import Extent, ZoomPan
from viewer.gui.panes.base import FigurePane


class EvidencePane(FigurePane):
    title = "evidence strip"
    span_chosen = Signal(int, int)  # first and last token of a drag: knock them out together

    def __init__(self, state, parent=None) -> None:
        super().__init__(state, parent)
        self.artists = None
        self._drawn_for = None  # the evidence the figure was built for
        self.zoom = ZoomPan(both=False)
        self._drag_from: int | None = None
        self.observe("analysis", "evidence", "source")
        self.message.setText("Run a text to see which tokens the prediction rests on.")

    def render(self):
        from viewer.figures.evidence import prediction_line

        a = self.state.analysis
        if a is None:
            self.set_title(self.title)
            return "Run a text to see which tokens the prediction rests on."
        rec = a.recording
        probs = rec.class_probabilities()
        line = prediction_line(rec.labels, probs, rec.predicted(), a.label)
        ev = self.state.evidence
        span = "" if ev is None or ev.span is None else f" · {ev.span.line()}"
        self.set_title(f"evidence strip · {line}{span}")
        if ev is None:
            return f"{line}\n\ncomputing the evidence for this prediction…"
        source = self.state.source

        def build() -> None:  # render thread
            from viewer.figures.evidence import mark_token, recording_evidence_into

            if self.artists is not None and self._drawn_for is ev:
                mark_token(self.artists, source)  # only the source token moved
                self.fast = True
                return
            if self.blitter is not None:
                self.blitter.detach()
            self.artists = recording_evidence_into(self.figure, rec, ev, gold=a.label)
            n = rec.n_tokens
            self.zoom.attach(self.artists.ax, Extent(-0.5, n - 0.5, -0.5, len(self.artists.row_labels) - 0.5))
            self.blitter = Blitter(self.agg, [self.artists.marker])
            self._drawn_for = ev
            mark_token(self.artists, source)

        return build

    def _token(self, event) -> int | None:
        if self.artists is None or event.inaxes is not self.artists.ax or event.xdata is None:
            return None
        i = int(round(event.xdata))
        return i if 0 <= i < self.artists.n_tokens else None

    def hover_at(self, event) -> str | None:
        i = self._token(event)
        ev = self.state.evidence
        if i is None or ev is None:
            return None
        rec = self.state.analysis.recording
        row = int(round(event.ydata))
        lines = [f"token {i} '{rec.tokens[i]}'"]
        row_labels, values, _ = ev.strip_rows()
        for k, name in enumerate(row_labels):
            mark = "▸ " if k == row else "  "
            lines.append(f"{mark}{name}: {float(values[k, i]):.4g}")
        return "\n".join(lines)

    def on_press(self, event) -> None:
        if event.button == 1:
            i = self._token(event)
            if i is not None:
                self.state.select_tokens(i, self.state.target)
            self._drag_from = i

    def on_release(self, event) -> None:
        start, self._drag_from = self._drag_from, None
        i = self._token(event)
        if event.button == 1 and start is not None and i is not None and i != start:
            self.span_chosen.emit(min(start, i), max(start, i))

    def on_scroll(self, event) -> None:
        if self.artists is not None and event.inaxes is self.artists.ax:
            if self.zoom.zoom(event.xdata, event.ydata, event.step):
                self.canvas.draw_idle()
