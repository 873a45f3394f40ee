"""The memory budget: what recording a batch of texts will take, estimated before anything is
allocated, so that a text too long for this machine is refused in one line instead of taking the
machine down.

The estimate counts the arrays a pass allocates beyond the loaded model (B texts padded to T
tokens; L layers, H query heads, G key/value heads, d head size, D hidden size, I MLP width, V
the vocabulary of a language-model head; 4 bytes a float32, 8 a float64), in four parts:

- **forward**: one layer's activations at a time (the model runs without gradients): the hidden
  states and their norms, the q/k/v projections and the heads' output, the MLP's hidden layer
  (gated MLPs hold two); the eager kernel also holds the B·H·T² scores and probabilities of a
  layer; a causal LM's logits at the last token of each text (B·V);
- **captures**: the layer handed to the sink, per text its q, k, v and head outputs as numpy
  arrays, and the temporaries of applying rotary positions;
- **kept**: what a recording keeps over all layers (q, k, v and head outputs), and the model's
  own probabilities where they are asked for (twice, while the model's own list is copied);
- **derived**: what re-deriving one layer's probabilities holds: its keys in float64, the
  blocks of scores of every thread, and in the window the overviews of every head.

A pass that keeps its autograd graph for a gradient (the shortcut screen's gradient × input)
holds every layer's activations until the backward, counted with the kept arrays: L times a
layer's forward activations.

They do not all live at once. The kept arrays grow to their full size by the end of the pass;
the forward's activations come and go layer by layer; a layer is handed to the sink (captured,
then re-derived by a check or a report) while the model waits at that layer's output
projection, with about half of a layer's activations alive (``ATTENTION_SHARE``). So the peak is

    kept + max(forward, ATTENTION_SHARE · forward + captures + derived) + overviews.

The coefficients (how many copies of each array live at once) were measured against the peak
resident memory of real passes (``tests/benchmarks/bench_long.py`` prints the estimate against
the measurement); ``tests/model/test_budget.py`` holds the estimate of a recording to at most 20% under and
45% over a measured peak at three lengths (measured ratios 1.04–1.29 in repeated runs: the
allocator's reuse of freed blocks moves the peak from run to run).

Known short side: a pass that keeps nothing (a check or a set report, no recording) on a
windowed family (ModernBERT) measured 0.4–0.6 times its estimate (0.45 GB measured against
0.17 GB at 2,107 tokens, 1.1–1.3 GB against 0.64 GB at 8,192), because transformers builds
the window masks as T × T tensors (int64 distances, boolean and float masks, measured with
torch's profiler) that the forward term does not count; a recording, which the arrays it keeps
dominate, stays within 0.90–0.98 on the same texts.

Evidence runs variants of one text (integrated-gradient path points with their backward, one
knockout per token) in batches sized by ``viewer.model.budget.batch_that_fits``: as many as fit
2 GB and the budget.
"""

from __future__ import annotations

from dataclasses import dataclass

from viewer.core.overview import OVERVIEW_CELLS
from viewer.core.scores import BLOCK_ENTRIES

F32, F64 = 4, 8
HIDDEN_COPIES = 6  # residual, attention output, norms, MLP output of one layer, at once
PROJECTION_COPIES = 3  # q/k/v as projected, split into heads, rotated
ROTARY_COPIES = 4  # x·cos, rotate_half(x), its concatenation, the sum (numpy temporaries)
EAGER_COPIES = 3  # scores, softmax, the mask added in place or broadcast
BLOCK_COPIES = 6  # scores, probabilities, entropy terms and products of one block
OWN_PROB_COPIES = 2  # the model's output_attentions and the recording's copy
ATTENTION_SHARE = 0.5  # of a layer's activations alive while its captures go to the sink


@dataclass(frozen=True)
class ModelSize:
    """The sizes of a checkpoint that the memory of a pass depends on."""

    layers: int  # L
    heads: int  # H
    kv_heads: int  # G
    head_dim: int  # d
    hidden: int  # D
    mlp: int  # I
    vocabulary: int = 0  # V of a causal LM head (0: no per-token logits are kept)
    gated_mlp: bool = False
    window_layers: int = 0  # layers whose rows see a bounded window
    window: int = 0  # the keys such a row sees


@dataclass(frozen=True)
class Estimate:
    """Bytes a pass will allocate, by part, and their sum at the peak."""

    forward: int
    captures: int
    kept: int
    derived: int
    overview: int = 0

    @property
    def total(self) -> int:
        sink = int(ATTENTION_SHARE * self.forward) + self.captures + self.derived
        return self.kept + max(self.forward, sink) + self.overview


def estimate(
    size: ModelSize,
    lengths: list[int],
    *,
    keep: bool,
    own_probs: bool,
    eager: bool,
    derive: bool = True,
    overview: bool = False,
    threads: int = 2,
    gradients: bool = False,
) -> Estimate:
    """What recording (``keep``) or streaming (a check, a set report) texts of ``lengths``
    tokens in one batch will allocate beyond the loaded model; with ``gradients`` the pass
    keeps its graph for a backward."""
    b, t = len(lengths), max(lengths, default=0)
    s = size
    tokens = b * t
    proj = (s.heads + 2 * s.kv_heads) * s.head_dim
    forward = F32 * tokens * (HIDDEN_COPIES * s.hidden + PROJECTION_COPIES * proj + s.heads * s.head_dim)
    forward += F32 * tokens * s.mlp * (4 if s.gated_mlp else 2)  # gate, up, act(gate), their product
    if eager:
        forward += F32 * EAGER_COPIES * b * s.heads * t * t
    forward += F32 * b * s.vocabulary
    per_layer = (2 * s.heads + 2 * s.kv_heads) * s.head_dim  # q, k, v, head outputs per token
    captures = F32 * sum(lengths) * (per_layer + ROTARY_COPIES * (s.heads + s.kv_heads) * s.head_dim)
    kept = 0
    if keep:
        kept += F32 * s.layers * sum(lengths) * per_layer
    probs = F32 * s.layers * s.heads * sum(n * n for n in lengths)
    if own_probs:
        kept += OWN_PROB_COPIES * probs if keep else probs // max(1, s.layers)
    if gradients:  # every layer's activations wait for the backward
        kept += s.layers * forward
    derived = views = 0
    longest = t
    if derive:  # keys and values in float64, blocks of scores of every thread
        derived = 2 * F64 * s.kv_heads * longest * s.head_dim + F64 * threads * BLOCK_COPIES * BLOCK_ENTRIES
    if overview:  # block max and mean of every head and the head mean, float32, and a layer's builder
        cells = min(OVERVIEW_CELLS, longest) ** 2
        views = 2 * F32 * s.layers * (s.heads + 1) * cells + threads * 2 * F64 * (s.heads + 1) * cells
    return Estimate(int(forward), int(captures), int(kept), int(derived), int(views))


def longest_that_fits(fits, most: int) -> int:
    """The largest length n <= ``most`` for which ``fits(n)`` (a test falling with n), or 0."""
    lo, hi = 0, most
    while lo < hi:
        mid = (lo + hi + 1) // 2
        if fits(mid):
            lo = mid
        else:
            hi = mid - 1
    return lo


def gigabytes(n: int) -> str:
    return f"{n / 2**30:.1f} GB"
