"""The memory budget of a pass, checked before the model runs (``viewer.core.budget``).

The budget is the memory the system reports available (psutil), less a reserve for everything
else the process and the desktop need, or ``HEADLIGHT_MEMORY`` when that is set and smaller (for
example ``HEADLIGHT_MEMORY=4G``: a user may keep Headlight within a share of the machine). A
pass whose estimate does not fit is refused in one line naming the estimate, the budget and
the longest length that fits.
"""

from __future__ import annotations

import os
from typing import Any

import psutil

from viewer.core.budget import Estimate, ModelSize, estimate, gigabytes, longest_that_fits
from viewer.errors import HeadlightError
from viewer.model.families import config_value

RESERVE = 512 << 20
"""Bytes left to everything else when the budget is what the system reports available."""

GATED_MLP = {"llama", "qwen2", "qwen3", "mistral", "gemma", "gemma2", "gemma3_text", "phi3", "modernbert"}


class MemoryBudgetError(HeadlightError):
    """A pass that does not fit the memory budget (the message names the length that does)."""


def model_size(loaded: Any) -> ModelSize:
    config, geometry = loaded.config, loaded.geometry
    hidden = int(
        config_value(config, "hidden_size", "dim", "n_embd", default=geometry.n_heads * geometry.head_dim)
    )
    mlp = config_value(config, "intermediate_size", "hidden_dim", "n_inner", "ffn_dim", default=None)
    windows = loaded.tables.windows
    bounded = [] if windows is None else [w for w in windows.tolist() if min(w) >= 0]
    return ModelSize(
        layers=loaded.n_layers,
        heads=geometry.n_heads,
        kv_heads=geometry.n_kv_heads,
        head_dim=geometry.head_dim,
        hidden=hidden,
        mlp=int(mlp) if mlp else 4 * hidden,
        vocabulary=int(getattr(config, "vocab_size", 0) or 0) if loaded.head_kind == "causal-lm" else 0,
        gated_mlp=getattr(config, "model_type", "") in GATED_MLP,
        window_layers=len(bounded),
        window=max((a + b + 1 for a, b in bounded), default=0),
    )


def parse_size(text: str) -> int:
    """Bytes from "4G", "512M", "2.5GB" or a plain number of bytes."""
    value = text.strip().upper().removesuffix("B")
    scale = {"K": 1 << 10, "M": 1 << 20, "G": 1 << 30, "T": 1 << 40}.get(value[-1:], 1)
    try:
        number = float(value[:-1] if scale > 1 else value)
    except ValueError:
        raise HeadlightError(f"HEADLIGHT_MEMORY={text!r} is not a size such as 4G or 512M") from None
    if number <= 0:
        raise HeadlightError(f"HEADLIGHT_MEMORY={text!r} must be positive")
    return int(number * scale)


def budget() -> int:
    """Bytes a pass may allocate now."""
    free = max(0, psutil.virtual_memory().available - RESERVE)
    limit = os.environ.get("HEADLIGHT_MEMORY")
    return min(free, parse_size(limit)) if limit else free


def pass_estimate(
    loaded: Any,
    lengths: list[int],
    *,
    keep: bool,
    own_probs: bool,
    overview: bool = False,
    gradients: bool = False,
) -> Estimate:
    """The estimate of one pass of ``loaded`` over texts of ``lengths`` tokens: ``keep`` every
    layer (a recording), the model's own probabilities (``own_probs``, the eager kernel), a long
    text's ``overview``, a backward pass (``gradients``)."""
    eager = own_probs or loaded.kernel == "eager"
    return estimate(
        model_size(loaded),
        lengths,
        keep=keep,
        own_probs=own_probs,
        eager=eager,
        overview=overview,
        gradients=gradients,
    )


def fits(loaded: Any, lengths: list[int], **options: bool) -> bool:
    """Whether a pass over texts of ``lengths`` tokens fits the budget (``options``: those of
    ``pass_estimate``)."""
    return pass_estimate(loaded, lengths, **options).total <= budget()


def require_fits(loaded: Any, lengths: list[int], **options: bool) -> Estimate:
    """The estimate of a pass over texts of ``lengths`` tokens (``options``: those of
    ``pass_estimate``); ``MemoryBudgetError`` when it does not fit the budget."""
    need = pass_estimate(loaded, lengths, **options)
    have = budget()
    if need.total <= have:
        return need
    longest = max(lengths)
    if len(lengths) > 1:
        raise MemoryBudgetError(
            f"a batch of {len(lengths)} texts of up to {longest:,} tokens needs about "
            f"{gigabytes(need.total)} and {gigabytes(have)} is free; use a smaller --batch-size"
        )

    most = longest_that_fits(lambda n: pass_estimate(loaded, [n], **options).total <= have, longest)
    what = "recording" if options.get("keep") else "running"
    advice = f"at most {most:,} tokens fit (cut with --max-tokens {most})" if most >= 2 else "nothing fits"
    raise MemoryBudgetError(
        f"{what} {longest:,} tokens needs about {gigabytes(need.total)} and {gigabytes(have)} is "
        f"free; {advice}"
    )


BATCH_BYTES = 2 << 30
"""A batch of variants of one text (integrated-gradient steps, one knockout per token) is sized
to allocate at most this much, or the budget when that is smaller: a bigger batch speeds a CPU
pass little, and integrated gradients of a 512-token text on a ModernBERT-base-sized model in
batches of 25 path points peaked at 16.5 GB (measured; the estimate said 18.6 GB)."""


def batch_that_fits(loaded: Any, length: int, most: int, **options: bool) -> int:
    """The most variants of one text of ``length`` tokens, at most ``most``, to run in one pass
    (``options``: those of ``pass_estimate``, e.g. ``gradients``) within ``BATCH_BYTES`` and the
    budget; at least 1, and ``MemoryBudgetError`` when even one does not fit the budget."""
    options = {"keep": False, "own_probs": False, **options}
    limit = min(budget(), BATCH_BYTES)
    size = longest_that_fits(lambda c: pass_estimate(loaded, [length] * c, **options).total <= limit, most)
    if size == 0:
        require_fits(loaded, [length], **options)
    return max(1, size)
