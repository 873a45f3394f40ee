"""Running a loaded model: forward passes, predictions, and recordings taken layer by layer.

A recording pass runs the model with its memory-efficient attention kernel (PyTorch's
``scaled_dot_product_attention``, "sdpa") where transformers offers it for the family, and with
the written-out "eager" kernel where it does not (DeBERTa, MPNet, Gemma 2's soft-capping), or
where the model's own probabilities are wanted: a short text (``OWN_PROBS_BYTES``), for which the
check then compares those too. The hooks (``viewer.model.recorder``) hand over each layer as
soon as it has run; ``scan`` turns it into one ``TextLayer`` per text (numpy, padding removed,
rotary applied) for a *sink*, so a text's torch tensors never pile up over layers.
``record`` is a scan whose sink keeps the layers as a ``viewer.core.recording.Recording``; the
check and the set reports use sinks that keep only their numbers.

Shapes: B texts in a batch, T padded tokens, n a text's own tokens, L layers, H query heads,
G key/value heads, d head size.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from typing import Any

import numpy as np
import torch

from viewer.core.overview import DENSE_TOKENS
from viewer.core.recording import Recording
from viewer.core.rotary import apply_rotary
from viewer.core.scores import LayerScores
from viewer.core.softmax import softmax
from viewer.core.terms import ScoreTerms
from viewer.errors import HeadlightError
from viewer.model.budget import fits, require_fits
from viewer.model.names import head_phrase
from viewer.model.recorder import Capture, LayerCapture
from viewer.model.tables import stack_terms
from viewer.model.tokens import BATCH_TOKENS, Batch

LoadedModel = Any  # viewer.model.loader.LoadedModel, which imports this module for its verbs

OWN_PROBS_BYTES = 256 << 20
"""The model's own probabilities of a batch (L·B·H·T² float32) are asked for up to this size;
longer texts are recorded without them (the check then compares the attention output)."""


@dataclass(frozen=True, eq=False)
class TextLayer:
    """One layer of one text, as numpy (padding removed, rotary applied)."""

    layer: int
    q: np.ndarray  # (H, n, d) float32
    k: np.ndarray  # (G, n, d)
    v: np.ndarray  # (G, n, d)
    context: np.ndarray  # (H, n, d) the model's own attention output
    terms: ScoreTerms  # this layer's terms, as layer 0 of a one-layer ScoreTerms
    scale: float
    causal: bool
    own: np.ndarray | None = None  # (H, n, n) the model's own probabilities

    def scores(self) -> LayerScores:
        return LayerScores(self.q, self.k, self.scale, self.causal, self.terms, 0, self.own)


Sink = Callable[[int, TextLayer], None]  # (text index in the batch, its layer)


def wants_own_probs(loaded: LoadedModel, batch: Batch) -> bool:
    """Whether the model's own probabilities of ``batch`` fit ``OWN_PROBS_BYTES``."""
    t = max(batch.lengths, default=0)
    return loaded.n_layers * len(batch.lengths) * loaded.n_heads * t * t * 4 <= OWN_PROBS_BYTES


@contextmanager
def attention_kernel(loaded: LoadedModel, kernel: str) -> Iterator[None]:
    """Run the model with ``kernel`` ("eager" or "sdpa") inside the block."""
    before = loaded.kernel
    if kernel == before:
        yield
        return
    loaded.model.set_attn_implementation(kernel)
    try:
        yield
    finally:
        loaded.model.set_attn_implementation(before)


def model_inputs(loaded: LoadedModel, batch: Batch) -> dict:
    inputs = {"input_ids": batch.encoding["input_ids"], "attention_mask": batch.encoding["attention_mask"]}
    if loaded.head_kind == "causal-lm":
        # only the logits that are read: each text's last real position (not (B, T, vocabulary))
        inputs["logits_to_keep"] = torch.as_tensor(sorted({n - 1 for n in batch.lengths}))
    return inputs


def forward(
    loaded: LoadedModel,
    batch: Batch,
    *,
    sink: Callable[[LayerCapture], None] | None = None,
    gates: torch.Tensor | None = None,
    output_attentions: bool = False,
    grad: bool = False,
    base_only: bool = False,
    **extra: Any,
):
    """One forward pass over a batch; returns the model's output.

    sink: receives each layer's captures as it completes; gates: (L, H) or (B, L, H)
    multiplicative gates on the head outputs (1 = untouched, 0 = knocked out); base_only runs the
    model without its prediction head (a masked LM's recording needs no (T, vocabulary) logits).
    """
    hooks = loaded.hooks
    hooks.gates = gates
    hooks.begin(sink)
    inputs = model_inputs(loaded, batch)
    inputs.update(extra)
    model = loaded.model.base_model if base_only else loaded.model
    if base_only:
        inputs.pop("logits_to_keep", None)
    try:
        with torch.set_grad_enabled(grad):
            out = model(**inputs, output_attentions=output_attentions)
        hooks.end()
    finally:
        hooks.gates = None
        hooks.stop()
    return out


def kept_logits(loaded: LoadedModel, batch: Batch, out: Any) -> torch.Tensor | None:
    """(B, C) classifier logits, or (B, V) a causal LM's logits at each text's last real token."""
    logits = getattr(out, "logits", None)
    if logits is None or loaded.head_kind not in ("classifier", "causal-lm"):
        return None
    if loaded.head_kind == "classifier":
        return logits
    positions = sorted({n - 1 for n in batch.lengths})
    column = torch.as_tensor([positions.index(n - 1) for n in batch.lengths])
    return logits[torch.arange(len(batch.lengths)), column]


def require_prediction(loaded: LoadedModel) -> None:
    if loaded.head_kind not in ("classifier", "causal-lm"):
        raise HeadlightError(
            f"{loaded.name} has {head_phrase(loaded.head_kind)}, with no prediction to explain; this needs "
            "a sequence classifier or a causal language model"
        )


def target_probabilities(loaded: LoadedModel, batch: Batch, out: Any) -> torch.Tensor:
    """(B, C) the distribution a prediction is read from, differentiable (for gradients).

    A classifier's class probabilities; for a causal LM, the next-token distribution at each
    text's last real token (the only position that sees the whole text). Numbers that are shown
    come from ``predict``, which applies the core's softmax to the same logits.
    """
    require_prediction(loaded)
    return torch.softmax(kept_logits(loaded, batch, out).float(), dim=-1)


def predict(loaded: LoadedModel, batch: Batch, gates: torch.Tensor | None = None) -> np.ndarray:
    """(B, C) target probabilities (float64, ``viewer.core.softmax`` of the model's logits)."""
    require_prediction(loaded)
    out = forward(loaded, batch, gates=gates)
    return softmax(kept_logits(loaded, batch, out).double().numpy())


def predict_ids(loaded: LoadedModel, id_lists: Sequence[Sequence[int]], batch_size: int = 32) -> np.ndarray:
    """(N, C) target probabilities for many token-id lists, in padded batches."""
    step = max(1, min(batch_size, loaded.text.max_batch))
    parts = [
        predict(loaded, loaded.text.from_ids(id_lists[i : i + step])) for i in range(0, len(id_lists), step)
    ]
    return np.concatenate(parts, axis=0)


# -- recording -------------------------------------------------------------------------------------


def _text_layer(loaded: LoadedModel, cap: LayerCapture, shared: Capture, i: int, n: int) -> TextLayer:
    """Text i's part (n real tokens) of a captured layer, as numpy with rotary applied."""
    q = cap.q[i, :, :n].float().numpy()  # (H, n, d)
    k = cap.k[i, :, :n].float().numpy()  # (G, n, d)
    if cap.rotary is not None:
        cos, sin = (t[min(i, t.shape[0] - 1), :n].float().numpy() for t in cap.rotary)  # (n, r)
        q, k = apply_rotary(q, cos, sin), apply_rotary(k, cos, sin)
    return TextLayer(
        layer=cap.layer,
        q=np.ascontiguousarray(q, dtype=np.float32),
        k=np.ascontiguousarray(k, dtype=np.float32),
        v=np.array(cap.v[i, :, :n].float().numpy(), copy=True),  # never a view of the model's own
        context=np.array(cap.context[i, :, :n].float().numpy(), copy=True),
        terms=loaded.tables.layer_terms(cap, shared, n),
        scale=float(loaded.tables.scales[cap.layer]),
        causal=loaded.family.causal,
    )


def scan(
    loaded: LoadedModel,
    batch: Batch,
    sink: Sink,
    *,
    own_probs: bool | None = None,
    keep: bool = False,
    grad: bool = False,
) -> Any:
    """Run ``batch`` and give every layer of every text to ``sink(text index, TextLayer)``.

    With the model's own probabilities (``own_probs``; by default when they fit
    ``OWN_PROBS_BYTES``) the eager kernel runs, the layers wait for the end of the pass and come
    with ``TextLayer.own``; otherwise each layer goes to the sink while the model runs on.
    ``keep`` says the sink keeps every layer (a recording), for the memory budget, which is
    checked before the model runs (``viewer.model.budget``). ``grad`` keeps the autograd graph
    (for a gradient taken after the pass; the captures are detached). Returns the model's output.
    """
    overview = keep and max(batch.lengths) > DENSE_TOKENS
    options = {"keep": keep, "overview": overview, "gradients": grad}  # of the memory budget
    if own_probs is None:  # a bonus, asked for only where it fits the memory budget too
        own = wants_own_probs(loaded, batch) and fits(loaded, batch.lengths, own_probs=True, **options)
    else:
        own = own_probs
    require_fits(loaded, batch.lengths, own_probs=own, **options)
    waiting: list[list[TextLayer]] = []

    def on_layer(cap: LayerCapture) -> None:
        parts = [_text_layer(loaded, cap, loaded.hooks.capture, i, n) for i, n in enumerate(batch.lengths)]
        if own:
            waiting.append(parts)
        else:
            for i, part in enumerate(parts):
                sink(i, part)

    base_only = loaded.head_kind not in ("classifier", "causal-lm")
    with attention_kernel(loaded, "eager" if own else loaded.kernel):
        out = forward(loaded, batch, sink=on_layer, output_attentions=own, base_only=base_only, grad=grad)
    if own:
        attentions = out.attentions
        if attentions is None or len(attentions) != loaded.n_layers:
            got = 0 if attentions is None else len(attentions)
            raise RuntimeError(f"model returned {got} attention maps for {loaded.n_layers} layers")
        for layer, parts in enumerate(waiting):
            probs = attentions[layer]  # (B, H, T, T)
            for i, (part, n) in enumerate(zip(parts, batch.lengths, strict=True)):
                sink(i, _with_own(part, probs[i, :, :n, :n].detach().float().numpy().copy()))
        out.attentions = None  # the model's (B, H, T, T) per layer, now held by the sink
    return out


def _with_own(part: TextLayer, own: np.ndarray) -> TextLayer:
    from dataclasses import replace

    return replace(part, own=own)


class RecordingSink:
    """Keeps every layer of a batch's texts, written into one array per field and text as the
    layers arrive (no per-layer list to stack at the end, which would double the peak)."""

    FIELDS = ("q", "k", "v", "context", "own")

    def __init__(self, n_texts: int, n_layers: int):
        self.n_layers = n_layers
        self.arrays: list[dict[str, np.ndarray] | None] = [None] * n_texts
        self.terms: list[list[ScoreTerms]] = [[] for _ in range(n_texts)]

    def __call__(self, i: int, part: TextLayer) -> None:
        arrays = self.arrays[i]
        if arrays is None:
            arrays = self.arrays[i] = {
                name: np.empty((self.n_layers, *getattr(part, name).shape), dtype=np.float32)
                for name in self.FIELDS
                if getattr(part, name) is not None
            }
        for name, array in arrays.items():
            array[part.layer] = getattr(part, name)
        self.terms[i].append(part.terms)

    def take(self, i: int) -> tuple[dict[str, np.ndarray], ScoreTerms]:
        arrays, self.arrays[i] = self.arrays[i], None
        if arrays is None or len(self.terms[i]) != self.n_layers:
            raise RuntimeError(f"recorded {len(self.terms[i])} of {self.n_layers} layers")
        return arrays, stack_terms(self.terms[i])


def recordings(loaded: LoadedModel, batch: Batch, own_probs: bool | None = None) -> list[Recording]:
    """Record every text of ``batch``."""
    kept = RecordingSink(len(batch.lengths), loaded.n_layers)
    out = scan(loaded, batch, kept, own_probs=own_probs, keep=True)
    logits = kept_logits(loaded, batch, out)
    logits = None if logits is None else logits.detach().float().numpy()
    enc = batch.encoding
    recs = []
    for i, n in enumerate(batch.lengths):
        arrays, terms = kept.take(i)
        notes = list(loaded.notes)
        cut = batch.cut_note(i)
        if cut:
            why = "the model reads" if loaded.text.max_tokens == loaded.text.model_limit else "--max-tokens"
            notes.append(f"{cut} ({why}: {loaded.text.max_tokens:,})")
        ids = enc["input_ids"][i, :n].numpy().copy()
        recs.append(
            Recording(
                text=batch.texts[i],
                tokens=loaded.text.tokens(ids.tolist()),
                offsets=enc["offset_mapping"][i, :n].numpy().copy(),
                special=enc["special_tokens_mask"][i, :n].numpy().astype(bool),
                token_ids=ids,
                q=arrays["q"],
                k=arrays["k"],
                v=arrays["v"],
                context=arrays["context"],
                own_probs=arrays.get("own"),
                scale=loaded.tables.scales.copy(),
                causal=loaded.family.causal,
                logits=np.zeros(0, np.float32) if logits is None else logits[i].copy(),
                head_kind=loaded.head_kind,
                labels=loaded.labels,
                family=loaded.family.name,
                model_name=loaded.name,
                truncated_from=batch.truncated_from[i],
                notes=tuple(notes),
                terms=terms,
                kernel="eager" if "own" in arrays else loaded.kernel,
            )
        )
    return recs


# -- passes over sets of texts --------------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class TextAttention:
    """What a set report learns of one text in one pass: no T × T is kept, only the attention
    from the query rows it asked for (``attentions``)."""

    text: str
    token_ids: np.ndarray  # (n,)
    offsets: np.ndarray  # (n, 2)
    special: np.ndarray  # (n,) bool
    target: np.ndarray | None  # (C,) target probabilities, None without a prediction head
    truncated_from: int | None
    rows: dict[int, np.ndarray]  # query row i -> (L, H, n) every layer's and head's attention from i
    grad_input: np.ndarray | None = None  # (n,) gradient × input toward the target, when asked

    def attention_from(self, i: int) -> np.ndarray:
        """(L, H, n) float64 attention from query row i (one of the rows the pass kept)."""
        return self.rows[int(i)]


RowChoice = Callable[[int, np.ndarray, np.ndarray], Sequence[int]]
"""(index of the text in the call, offsets (n, 2), special (n,)) -> the query rows to keep."""


def summary_rows(loaded: LoadedModel) -> RowChoice:
    """Keep the summary token's row (``viewer.core.summary``)."""
    from viewer.core.summary import summary_index

    return lambda _i, offsets, _special: [summary_index(len(offsets), loaded.family.causal)]


class _PassSink:
    """A set pass's sink: head metrics of every layer, and the chosen rows."""

    def __init__(self, loaded: LoadedModel, batch: Batch, wanted: list[list[int]], stats: Any):
        self.n_layers, self.stats, self.wanted = loaded.n_layers, stats, wanted
        self.special = [
            batch.encoding["special_tokens_mask"][i, :n].numpy().astype(bool)
            for i, n in enumerate(batch.lengths)
        ]
        self.rows: list[dict[int, np.ndarray]] = [
            {r: np.zeros((self.n_layers, loaded.n_heads, n)) for r in rows}
            for rows, n in zip(wanted, batch.lengths, strict=True)
        ]

    def __call__(self, i: int, part: TextLayer) -> None:
        scores = part.scores()
        for r, out in self.rows[i].items():
            out[part.layer] = scores.row(r)
        if self.stats is not None:
            self.stats.add_layer(part.layer, scores, self.special[i])


@contextmanager
def input_embeddings(loaded: LoadedModel) -> Iterator[list[torch.Tensor]]:
    """Inside the block, the output of the model's input-embedding module becomes a leaf tensor
    that gradients can be taken against (x of gradient × input), appended to the yielded list.

    The model still runs on its input ids, so everything that reads them (a decoder
    classifier's last real token, RoBERTa-style positions) is as in any other pass."""
    kept: list[torch.Tensor] = []

    def leaf(_module: Any, _args: Any, output: torch.Tensor) -> torch.Tensor:
        x = output.detach().requires_grad_(True)
        kept.append(x)
        return x

    handle = loaded.model.get_input_embeddings().register_forward_hook(leaf)
    try:
        yield kept
    finally:
        handle.remove()


GRADIENT_TOKENS = 2048
"""Padded tokens a batch of a gradient pass holds at most: such a pass keeps every layer's
activations until its backward (``viewer.core.budget``)."""


def _gradient_times_input(
    loaded: LoadedModel, batch: Batch, sink: _PassSink
) -> tuple[Any, np.ndarray, np.ndarray]:
    """One forward with capture and one backward over ``batch``: (output, target probabilities
    (B, C) float64, gradient × input (B, T) float64).

    Gradient × input (Baehrens et al. 2010; Shrikumar et al. 2017) of F = the log-odds of the
    target, each text's own predicted class (top next token), ``log_odds``: Σ_dims x ⊙ ∂F/∂x per
    token, x the
    input embeddings. The batch's F are summed before the one backward: the texts of a batch do
    not see each other, so each text's gradient is its own (padding only moves float32 sums in
    their last bits, as in every batched pass)."""
    with input_embeddings(loaded) as leaves:
        out = scan(loaded, batch, sink, own_probs=False, grad=True)
    if len(leaves) != 1:
        raise RuntimeError(f"the input embeddings ran {len(leaves)} times in one pass")
    (x,) = leaves  # (B, T, D)
    logits = kept_logits(loaded, batch, out).float()  # (B, C)
    targets = softmax(logits.detach().double().numpy())
    chosen = torch.as_tensor(targets.argmax(axis=1))
    f = log_odds(logits, chosen)  # (B,)
    (g,) = torch.autograd.grad(f.sum(), x)
    return out, targets, (x.detach() * g).sum(-1).double().numpy()


def log_odds(logits: torch.Tensor, chosen: torch.Tensor) -> torch.Tensor:
    """(B,) log p(c) / (1 − p(c)) of class ``chosen`` from (B, C) logits: z_c − logsumexp of
    the other classes' logits. Unlike p(c) its gradient does not vanish when p(c) nears 1."""
    rows = torch.arange(len(chosen))
    others = logits.clone()
    others[rows, chosen] = float("-inf")
    return logits[rows, chosen] - torch.logsumexp(others, dim=-1)


def attentions(
    loaded: LoadedModel,
    texts: Sequence[str],
    batch_size: int = 16,
    *,
    rows: RowChoice | None = None,
    stats: Any = None,
    attention: bool = True,
    gradients: bool = False,
) -> Iterator[TextAttention]:
    """One pass over ``texts`` for a set report, a text at a time in padded batches.

    rows: which query rows of each text to keep (default: the summary token's); stats: a
    ``viewer.core.headstats.HeadStats`` every text is added to, layer by layer, block by block;
    ``attention=False`` runs the model for its predictions only (no capture at all);
    ``gradients`` adds each text's gradient × input toward its prediction
    (``TextAttention.grad_input``): one backward per batch, the batch held to
    ``GRADIENT_TOKENS`` padded tokens, the memory-efficient kernel where the family has one.
    """
    choose = rows or summary_rows(loaded)
    predicts = loaded.head_kind in ("classifier", "causal-lm")
    if gradients:
        require_prediction(loaded)
        if not attention:  # the backward runs inside the attention pass (``_gradient_times_input``)
            raise ValueError("gradients are taken in the attention pass: attention=False has none")
    limit = GRADIENT_TOKENS if gradients else BATCH_TOKENS
    for batch in loaded.text.batches(texts, batch_size, limit):
        enc = batch.encoding
        offsets = [enc["offset_mapping"][i, :n].numpy().copy() for i, n in enumerate(batch.lengths)]
        special = [
            enc["special_tokens_mask"][i, :n].numpy().astype(bool) for i, n in enumerate(batch.lengths)
        ]
        if attention:
            wanted = [
                sorted(set(choose(i, o, s))) for i, (o, s) in enumerate(zip(offsets, special, strict=True))
            ]
            sink = _PassSink(loaded, batch, wanted, stats)
            if gradients:
                out, targets, grad_input = _gradient_times_input(loaded, batch, sink)
            else:
                out = scan(loaded, batch, sink)
            kept = sink.rows
        else:
            out = forward(loaded, batch)
            kept = [{} for _ in batch.lengths]
        if not gradients:
            logits = kept_logits(loaded, batch, out) if predicts else None
            targets = None if logits is None else softmax(logits.detach().double().numpy())
            grad_input = None
        for i, n in enumerate(batch.lengths):
            if stats is not None and attention:
                stats.count_text()
            yield TextAttention(
                text=batch.texts[i],
                token_ids=enc["input_ids"][i, :n].numpy().copy(),
                offsets=offsets[i],
                special=special[i],
                target=None if targets is None else targets[i],
                truncated_from=batch.truncated_from[i],
                rows=kept[i],
                grad_input=None if grad_input is None else grad_input[i, :n].copy(),
            )
