"""The evidence strip: several kinds of per-token evidence for one prediction, side by side.

Attention alone is not an explanation (Jain & Wallace 2019), so each attention-based row is
shown beside counterfactual evidence (token knockout) and gradient evidence, and each row's
ranking of the tokens is compared with the knockout ranking by Spearman's ρ over the ordinary
(non-special) tokens. A low or negative ρ is the sign that attention misleads on this text.

Rows (all (T,), one value per token of the recording):

- ``attention``: last-layer head-mean attention from the summary token to each token;
- ``rollout``: attention rollout from the summary token (Abnar & Zuidema 2020, Eq. 1, residual
  as 0.5·A + 0.5·I);
- ``flow``: attention flow to the summary token at the top (Abnar & Zuidema 2020), max-flow;
- ``value_norm``: ‖Σ_h α_sj f_h(x_j)‖ in the last layer (Kobayashi et al. 2020);
- ``grad_input``: Σ_dims x ⊙ ∂F/∂x on the input embeddings;
- ``integrated_gradients``: Σ_dims IG on the input embeddings (Sundararajan et al. 2017);
- ``knockout``: F(text) − F(text without the token).

The summary token is the first token of an encoder ([CLS], <s>) and the last token of a causal
decoder, which is the only decoder position that sees the whole text; so for decoders every
attention-based row reads the last query row, whose softmax runs over all T keys, and nothing
needs re-normalising. F is the probability of the predicted class (or of the top next token).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import asdict, dataclass, field, replace

import numpy as np

from viewer.core.norms import head_sum_norms
from viewer.core.recording import Recording
from viewer.core.rollout import FLOW_MAX_TOKENS, attention_flow, rollout_row
from viewer.core.stats import spearman
from viewer.core.summary import summary_attention
from viewer.errors import HeadlightError
from viewer.model.attribution import gradient_evidence, predict_without, token_knockout
from viewer.model.loader import LoadedModel
from viewer.model.names import head_phrase
from viewer.reports.heads import predicts

ROWS = ("attention", "rollout", "flow", "value_norm", "grad_input", "integrated_gradients", "knockout")
ROW_TITLES = {
    "attention": "summary-token attention (last layer, head mean)",
    "rollout": "attention rollout",
    "flow": "attention flow",
    "value_norm": "value-weighted norm (last layer)",
    "grad_input": "gradient × input",
    "integrated_gradients": "integrated gradients",
    "knockout": "knockout: drop in probability",
}
# Short row names for the strip (the titles above go to tooltips and the card).
ROW_LABELS = {
    "attention": "summary attention",
    "rollout": "rollout",
    "flow": "flow",
    "value_norm": "value norm",
    "grad_input": "grad × input",
    "integrated_gradients": "integrated gradients",
    "knockout": "knockout",
}
FLAT_KNOCKOUT = 0.01
"""Below this largest single-token knockout drop (in probability, over the ordinary tokens) the
knockout row is flat and rank agreements with it are withheld (docs/definitions.md, "Flat
knockout")."""
HEAD_EVIDENCE_TOKENS = 256
"""Per-head importance and knockout of one text are computed up to this many tokens."""
EVIDENCE_TOKENS = 1024
"""Gradient and token-knockout rows are computed up to this many tokens: knockout runs the model
once per token, integrated gradients dozens of times with gradients, and a backward pass holds
every layer's activations (the attention-based rows have no such limit)."""


@dataclass(frozen=True)
class SpanKnockout:
    """Tokens ``first``..``last`` (inclusive) knocked out together (docs/definitions.md,
    "Flat knockout"): their ordinary tokens deleted from the input as one, the model run again."""

    first: int
    last: int
    text: str  # the characters the span covers
    deleted: int  # ordinary tokens deleted (special tokens stay)
    target_label: str
    p_before: float
    p_after: float
    predicted_after: str | None  # the class predicted without the span (classifiers)

    @property
    def drop(self) -> float:
        return self.p_before - self.p_after

    def line(self) -> str:
        """One line for the strip's title and the command's output."""
        now = "" if self.predicted_after is None else f"; predicted without it: {self.predicted_after}"
        return (
            f"span knockout of '{self.text}' (tokens {self.first}–{self.last}): p({self.target_label}) "
            f"{self.p_before:.3f} → {self.p_after:.3f}, drop {self.drop:+.3f}{now}"
        )

    def to_dict(self) -> dict:
        return {**asdict(self), "drop": self.drop}


@dataclass(frozen=True, eq=False)
class Evidence:
    recording: Recording
    rows: dict[str, np.ndarray]  # row name (``ROWS``) -> (T,) values, NaN where it does not apply
    per_head_attention: np.ndarray  # (H, T) last-layer attention from the summary token
    agreement: dict[str, float]  # row name -> Spearman ρ with the knockout row (ordinary tokens)
    target: int | None  # index of the explained class / next token
    target_label: str | None
    probabilities: np.ndarray  # (C,) class probabilities (empty for LMs and bare encoders)
    completeness_gap: float | None  # IG: |Σ IG − (F(x) − F(x'))| / |F(x) − F(x')|
    ig_steps: int | None = None  # path steps integrated gradients used (refined when needed)
    notes: tuple[str, ...] = field(default_factory=tuple)
    head_importance: np.ndarray | None = None  # (L, H) Michel et al. 2019 for this text
    head_knockout: np.ndarray | None = None  # (L, H) drop in p(target), each head knocked out
    withheld: str | None = None  # why the rank agreements are withheld (a flat knockout row)
    span: SpanKnockout | None = None  # a span of tokens knocked out together, on request

    def strip_rows(self) -> tuple[tuple[str, ...], np.ndarray, tuple[float | str | None, ...]]:
        """The rows the evidence strip draws: (row labels, (K, T) values, agreement).

        Rows that do not apply here (all NaN) are left out; labels are ``ROW_LABELS``; the
        knockout row is the reference the others' Spearman agreement is measured against.
        """
        names = [k for k in ROWS if np.isfinite(self.rows[k]).any()]
        values = np.stack([np.asarray(self.rows[k], dtype=np.float64) for k in names])
        agreement = tuple(strip_agreement(k, self.agreement, self.withheld) for k in names)
        return tuple(ROW_LABELS[k] for k in names), values, agreement

    def to_dict(self) -> dict:
        rec = self.recording

        def num(x):
            return None if x is None or not np.isfinite(x) else float(x)

        return {
            "text": rec.text,
            "tokens": list(rec.tokens),
            "special": [bool(s) for s in rec.special],
            "summary_token": rec.summary_index(),
            "target": self.target,
            "target_label": self.target_label,
            "probabilities": {lab: float(p) for lab, p in zip(rec.labels, self.probabilities, strict=False)},
            "rows": {k: [num(v) for v in self.rows[k]] for k in ROWS},
            "agreement_with_knockout": {k: num(v) for k, v in self.agreement.items()},
            "agreement_withheld": self.withheld,
            "span_knockout": None if self.span is None else self.span.to_dict(),
            "integrated_gradients_completeness_gap": num(self.completeness_gap),
            "integrated_gradients_steps": self.ig_steps,
            "notes": list(self.notes),
            **{
                name: None if grid is None else [[num(v) for v in row] for row in grid]
                for name, grid in (
                    ("head_importance", self.head_importance),
                    ("head_knockout", self.head_knockout),
                )
            },
        }


def strip_agreement(row: str, agreement: dict, withheld: str | None) -> float | str | None:
    """What the strip writes at the right of ``row``: its ρ with knockout, "reference" for the
    knockout row itself, "ρ withheld" / "knockout flat" when the knockout row is flat."""
    if row == "knockout":
        return "knockout flat" if withheld else "reference"
    return agreement.get(row, "ρ withheld" if withheld else None)


def value_norm_row(loaded: LoadedModel, rec: Recording, summary: int) -> np.ndarray:
    """‖Σ_h α^h_sj f_h(x_j)‖ for the summary row s of the last layer (Kobayashi et al. 2020).

    f_h(x_j) = (x_j W_V^h + b_V^h) W_O^h: the captured values already are x_j W_V^h + b_V^h,
    so only the output projection's slice W_O^h is applied here (``head_sum_norms``, by blocks
    of tokens: a long text never holds every head's f).
    """
    layer = rec.n_layers - 1
    h, d = rec.n_heads, rec.q.shape[-1]
    w_o = loaded.output_projection(layer).reshape(h, d, -1)  # (H, d, D)
    alpha = rec.layer(layer).rows(slice(summary, summary + 1))  # (H, 1, T) the summary row
    return head_sum_norms(alpha, rec.v[layer], w_o)[0]


def evidence_for(
    loaded: LoadedModel,
    text: str,
    *,
    steps: int = 50,
    recording: Recording | None = None,
    knockout_batch: int = 32,
) -> Evidence:
    """All evidence rows for one text (the model is run several times; use a worker thread)."""
    rec = recording if recording is not None else loaded.record(text)
    s = rec.summary_index()
    t = rec.n_tokens
    notes = list(rec.notes)
    rows = {k: np.full(t, np.nan) for k in ROWS}
    last = rec.layer(rec.n_layers - 1).row(s)  # (H, T) last layer, from the summary token
    rows["attention"] = summary_attention(last)  # (T,) head mean
    rows["rollout"] = rollout_row([rec.layer(layer) for layer in range(rec.n_layers)], s)
    if t <= FLOW_MAX_TOKENS:
        rows["flow"] = attention_flow(rec.attention_matrices(), s, max_tokens=FLOW_MAX_TOKENS)
    else:
        notes.append(f"attention flow is computed up to {FLOW_MAX_TOKENS} tokens; this text has {t}")
    rows["value_norm"] = value_norm_row(loaded, rec, s)

    target = label = None
    probs = rec.class_probabilities()
    gap = ig_steps = None
    if predicts(loaded):
        dist = rec.target_distribution()
        target = int(np.argmax(dist))
        label = (
            rec.labels[target]
            if loaded.head_kind == "classifier"
            else loaded.tokenizer.convert_ids_to_tokens(target)
        )
        if t > EVIDENCE_TOKENS:
            notes.append(
                f"gradient and knockout rows are computed up to {EVIDENCE_TOKENS} tokens; this text has {t}"
            )
        else:
            grads = gradient_evidence(loaded, text, target, steps=steps)
            rows["grad_input"] = grads.grad_input
            rows["integrated_gradients"] = grads.integrated
            gap = grads.completeness_gap
            ig_steps = grads.steps
            if grads.steps > steps:
                notes.append(
                    f"integrated gradients needed {grads.steps} steps to add up to the "
                    "change in probability (the prediction switches abruptly on the path)"
                )
            rows["knockout"] = token_knockout(
                loaded, rec.token_ids, rec.special, target, float(dist[target]), batch_size=knockout_batch
            )
    else:
        notes.append(
            f"{loaded.name} has {head_phrase(loaded.head_kind)}: no prediction to explain, so "
            "no gradient or knockout rows"
        )

    ordinary = ~rec.special
    agreement = {}
    withheld = flat_knockout(rows["knockout"][ordinary])
    if withheld:
        notes.append(withheld)
    elif np.isfinite(rows["knockout"]).any() and ordinary.sum() >= 2:
        for name in ROWS[:-1]:
            agreement[name] = (
                spearman(rows[name][ordinary], rows["knockout"][ordinary])
                if np.all(np.isfinite(rows[name][ordinary]))
                else float("nan")
            )
    return Evidence(
        rec, rows, last, agreement, target, label, probs, gap, ig_steps, tuple(notes), withheld=withheld
    )


def flat_knockout(drops: np.ndarray, floor: float = FLAT_KNOCKOUT) -> str | None:
    """Why rank agreements with a knockout row of ``drops`` (ordinary tokens) are withheld, or
    None: when no single token's knockout moves the probability by ``floor`` or more
    (docs/definitions.md, "Flat knockout"), the tokens back each other up and the row's order is
    the order of differences too small to rank anything by."""
    d = np.abs(np.asarray(drops, dtype=np.float64))
    d = d[np.isfinite(d)]
    if not d.size or d.max() >= floor:
        return None
    return (
        f"knockout is flat: no single token moves the probability by {floor:g} or more "
        f"(largest {d.max():.1g}), so rank agreements with it are withheld; knock out a "
        "span of tokens together instead (the evidence strip: drag across tokens; the command: "
        "--knockout-span)"
    )


def span_knockout(loaded: LoadedModel, ev: Evidence, first: int, last: int) -> SpanKnockout:
    """``ev``'s prediction with tokens ``first``..``last`` (either order) deleted together
    (``viewer.model.attribution.predict_without``, the one knockout by deletion)."""
    rec = ev.recording
    if ev.target is None:
        raise HeadlightError("this model makes no prediction to knock a span out of")
    first, last = sorted((int(first), int(last)))
    if first < 0 or last >= rec.n_tokens:
        raise HeadlightError(f"tokens {first}–{last} are not in this text of {rec.n_tokens} tokens")
    gone = [t for t in range(first, last + 1) if not rec.special[t]]
    if not gone:
        raise HeadlightError("the span holds only special tokens, which are never knocked out")
    if len(gone) == int((~rec.special).sum()):
        raise HeadlightError("the span is the whole text; leave at least one token")
    p = predict_without(loaded, [(rec.token_ids, gone)])[0]  # (C,)
    starts = [rec.offsets[t][0] for t in gone]
    ends = [rec.offsets[t][1] for t in gone]
    return SpanKnockout(
        first,
        last,
        rec.text[min(starts) : max(ends)],
        len(gone),
        str(ev.target_label),
        float(rec.target_distribution()[ev.target]),
        float(p[ev.target]),
        rec.labels[int(np.argmax(p))] if loaded.head_kind == "classifier" else None,
    )


def with_span_of(loaded: LoadedModel, ev: Evidence, phrase: str) -> Evidence:
    """``ev`` with the span knockout of ``phrase``'s first occurrence in the text."""
    return replace(ev, span=span_knockout(loaded, ev, *phrase_tokens(ev.recording, phrase)))


def phrase_tokens(rec: Recording, phrase: str) -> tuple[int, int]:
    """The first and last token of the first case-insensitive occurrence of ``phrase`` in the
    recording's text (tokens whose characters overlap it)."""
    at = rec.text.lower().find(phrase.lower().strip())
    if not phrase.strip() or at < 0:
        raise HeadlightError(f"'{phrase}' does not occur in the text")
    end = at + len(phrase.strip())
    hit = [
        t
        for t in range(rec.n_tokens)
        if not rec.special[t] and rec.offsets[t][0] < end and rec.offsets[t][1] > at
    ]
    if not hit:
        raise HeadlightError(f"no token of the text covers '{phrase}'")
    return hit[0], hit[-1]


def head_evidence(
    loaded: LoadedModel, text: str, tick: Callable[[int], None] | None = None
) -> tuple[np.ndarray | None, np.ndarray | None]:
    """(L, H) head importance (Michel et al. 2019, Eq. 2) and each head's knockout effect
    (drop in the predicted class's probability) for one text; None where a model has no
    prediction. ``tick`` is called between heads (a window uses it to cancel)."""
    from viewer.reports.heads import head_importance, head_knockout
    from viewer.reports.textsets import TextItem

    item = [TextItem(text, None, 1)]
    try:
        importance = head_importance(loaded, item, progress=tick)["importance"]
        knockout = head_knockout(loaded, item, progress=tick)["prob_drop"]
    except HeadlightError:
        return None, None
    return importance, knockout
