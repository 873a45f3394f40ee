"""Evidence that needs the model: gradients on the embeddings, knockout, head importance.

The prediction being explained is the *target*: the predicted class of a classifier, or the
top next token of a causal LM at the text's last token. F(x) is the model's probability of the
target (``LoadedModel.target_probabilities``), so every number here is in probability units.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np
import torch

from viewer.core.gradients import completeness_gap, integrated_gradients
from viewer.model import gates as head_gates
from viewer.model.budget import batch_that_fits
from viewer.model.loader import Batch, LoadedModel


def _embed(loaded: LoadedModel, ids: torch.Tensor) -> torch.Tensor:
    return loaded.model.get_input_embeddings()(ids).detach()


def _target_fn(loaded: LoadedModel, batch: Batch, target: int) -> Callable[[torch.Tensor], torch.Tensor]:
    """F(e) for a stack of input-embedding sequences e (S, T, D) of the one text in `batch`."""
    mask = batch.encoding["attention_mask"]

    def f(embeds: torch.Tensor) -> torch.Tensor:
        n = embeds.shape[0]
        out = loaded.forward(
            batch, inputs_embeds=embeds, grad=True, input_ids=None, attention_mask=mask.expand(n, -1)
        )
        probs = loaded.target_probabilities(
            Batch(batch.encoding, batch.lengths * n, batch.truncated_from * n, batch.texts * n),
            out,
        )
        return probs[:, target]  # (S,)

    return f


def _grad(f: Callable[[torch.Tensor], torch.Tensor], embeds: torch.Tensor) -> torch.Tensor:
    e = embeds.clone().requires_grad_(True)
    (g,) = torch.autograd.grad(f(e).sum(), e)
    return g.detach()


@dataclass(frozen=True)
class GradientEvidence:
    grad_input: np.ndarray  # (T,) Σ_dims x ⊙ ∂F/∂x (Shrikumar et al. 2017; Baehrens et al. 2010)
    integrated: np.ndarray  # (T,) Σ_dims integrated gradients (Sundararajan et al. 2017, Eq. 1)
    f_input: float  # F(x)
    f_baseline: float  # F(x')
    steps: int

    @property
    def completeness_gap(self) -> float:
        """|Σ IG − (F(x) − F(x'))| / |F(x) − F(x')| (Sundararajan et al. 2017, Prop. 1: 0 exactly)."""
        return completeness_gap(self.integrated, self.f_input, self.f_baseline)


def gradient_evidence(
    loaded: LoadedModel,
    text: str,
    target: int,
    *,
    steps: int = 50,
    max_steps: int = 800,
    tolerance: float = 0.01,
    chunk: int = 25,
) -> GradientEvidence:
    """Gradient × input and integrated gradients on the input embeddings of one text.

    Baseline x': the word embedding of every ordinary token replaced by zeros; special tokens
    ([CLS], [SEP], …) keep theirs, and position embeddings are added by the model as usual
    (common practice for text; Sundararajan et al. 2017, §6.3 use all-zero word embeddings).

    The path integral starts with `steps` trapezoid steps. When the sum of the attributions
    misses F(x) − F(x') by more than `tolerance` of max(|F(x) − F(x')|, 0.01) — which happens
    when the prediction switches abruptly somewhere along the path — the step count is doubled,
    up to `max_steps`; the steps used are reported. At most `chunk` path points run in one
    batch, fewer when their backward would not fit ``viewer.model.budget.batch_that_fits``.
    """
    batch = loaded.encode([text])
    chunk = batch_that_fits(loaded, batch.lengths[0], chunk, gradients=True)
    ids = batch.encoding["input_ids"]
    x = _embed(loaded, ids)  # (1, T, D)
    special = batch.encoding["special_tokens_mask"].bool()[0]
    baseline = x.clone()
    baseline[0, ~special] = 0.0
    f = _target_fn(loaded, batch, target)
    with torch.no_grad():
        f_x, f_b = float(f(x)[0]), float(f(baseline)[0])
    gi = (x * _grad(f, x))[0].sum(-1).double().numpy()

    def grad_fn(points: np.ndarray) -> np.ndarray:  # (S, T, D) path points -> ∂F/∂x there
        return _grad(f, torch.from_numpy(points).to(x.dtype)).double().numpy()

    x0, b0 = x[0].double().numpy(), baseline[0].double().numpy()
    allowed = tolerance * max(abs(f_x - f_b), 0.01)
    n = steps
    while True:
        attr = integrated_gradients(grad_fn, x0, b0, steps=n, batch_size=chunk)  # (T, D)
        if abs(float(attr.sum()) - (f_x - f_b)) <= allowed or n * 2 > max_steps:
            break
        n *= 2
    return GradientEvidence(gi, attr.sum(-1), f_x, f_b, n)


def predict_without(
    loaded: LoadedModel, cases: Sequence[tuple[Sequence[int], Sequence[int]]], batch_size: int = 32
) -> np.ndarray:
    """(N, C) target probabilities for N (token ids, positions to delete) cases, batched.

    The one definition of knockout by deletion (docs/definitions.md, "Word knockout"): the
    listed sub-tokens are removed from the text's input ids and the shortened input is run
    again. Cases may come from different texts, so a report can batch across texts.
    """
    variants = [
        np.delete(np.asarray(ids, dtype=np.int64), np.asarray(gone, dtype=np.int64)).tolist()
        for ids, gone in cases
    ]
    if not variants:
        return np.zeros((0, 0))
    return loaded.predict_ids(variants, batch_size=batch_size)


def token_knockout(
    loaded: LoadedModel,
    token_ids: Sequence[int],
    special: np.ndarray,
    target: int,
    p_before: float,
    batch_size: int = 32,
) -> np.ndarray:
    """(T,) drop in the target probability when each ordinary token is deleted from the input.

    Special tokens are never deleted (NaN in their place). drop = p(target | text) −
    p(target | text without token t): positive when the token supported the prediction.
    At most ``batch_size`` variants run at once, fewer where they would not fit
    (``viewer.model.budget.batch_that_fits``).
    """
    positions = [t for t in range(len(token_ids)) if not special[t]]
    drops = np.full(len(token_ids), np.nan)
    if not positions:
        return drops
    batch_size = batch_that_fits(loaded, len(token_ids), batch_size)
    after = predict_without(loaded, [(token_ids, [t]) for t in positions], batch_size)[:, target]
    drops[positions] = p_before - after
    return drops


def head_importance_sums(
    loaded: LoadedModel,
    texts: Sequence[str],
    targets: Sequence[int],
    batch_size: int = 16,
    progress: Callable[[int], None] | None = None,
) -> np.ndarray:
    """Σ over texts of |∂L/∂ξ_h| with L the cross-entropy against `targets` (L, H).

    Michel et al. 2019, Eq. 2: I_h = E_x |∂L(x)/∂ξ_h|; each text gets its own gates (B, L, H)
    so that the absolute value is taken per text, as the expectation requires.
    """
    total = np.zeros((loaded.n_layers, loaded.n_heads))
    size = max(1, min(batch_size, loaded.max_batch))
    for start in range(0, len(texts), size):
        batch = loaded.encode(texts[start : start + size])
        n = len(batch.lengths)
        g = torch.ones(n, loaded.n_layers, loaded.n_heads, requires_grad=True)
        out = loaded.forward(batch, gates=g, grad=True)
        probs = loaded.target_probabilities(batch, out)
        y = torch.as_tensor(list(targets[start : start + n]), dtype=torch.long)
        loss = torch.nn.functional.nll_loss(torch.log(probs.clamp_min(1e-30)), y, reduction="sum")
        (grad,) = torch.autograd.grad(loss, g)
        total += grad.abs().sum(dim=0).double().numpy()
        if progress:
            progress(n)
    return total


def head_knockout_effects(
    loaded: LoadedModel,
    texts: Sequence[str],
    labels: Sequence[int] | None,
    batch_size: int = 16,
    progress: Callable[[int], None] | None = None,
) -> dict[str, np.ndarray]:
    """Knock out each head alone; measure accuracy and the predicted-class probability.

    Returns (L, H) arrays: ``prob_drop`` (mean over texts of p(original prediction) before minus
    after) and, when labels are given, ``accuracy`` after knockout, with ``base_accuracy``.
    """
    size = max(1, min(batch_size, loaded.max_batch))
    batches = [loaded.encode(texts[i : i + size]) for i in range(0, len(texts), size)]
    base = np.concatenate([loaded.predict(b) for b in batches], axis=0)  # (N, C)
    pred = base.argmax(axis=1)
    p_before = base[np.arange(len(pred)), pred]
    n_l, n_h = loaded.n_layers, loaded.n_heads
    drop = np.zeros((n_l, n_h))
    acc = np.zeros((n_l, n_h))
    y = None if labels is None else np.asarray(labels)
    for layer in range(n_l):
        for head in range(n_h):
            g = head_gates.knockout_gates(loaded, [(layer, head)])
            after = np.concatenate([loaded.predict(b, gates=g) for b in batches], axis=0)
            drop[layer, head] = float(np.mean(p_before - after[np.arange(len(pred)), pred]))
            if y is not None:
                acc[layer, head] = float(np.mean(after.argmax(axis=1) == y))
            if progress:
                progress(1)
    result = {"prob_drop": drop}
    if y is not None:
        result["accuracy"] = acc
        result["base_accuracy"] = np.array(float(np.mean(pred == y)))
    return result
