"""The overview of a long text's pair grid: cells pooled into screen-sized blocks.

A head of a text of T tokens has T × T attention cells, far more than a screen has pixels at
T = 8,192. The overview pools them into an n × n grid of *blocks* of c × c cells (c = ⌈T / n⌉,
the last row and column of blocks holding what is left):

- **block max**: the largest probability in the block, which keeps a single strong link visible
  however many weak cells surround it;
- **block mean**: the mean over the block's *visible* cells (a key a row cannot see is not a
  zero to average in), which shows where the mass goes.

A block with no visible cell is masked (NaN), drawn hatched like a masked cell. Both are filled
block by block of query rows (``add``), from the probabilities ``viewer.core.scores`` computes,
so a head's T × T never exists at once.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from viewer.core.scores import Block, LayerScores

DENSE_TOKENS = 1024
"""Texts up to this many tokens are drawn cell by cell (a head's grid is 4 MB of float32 at this
length); longer texts as overviews of pooled blocks."""

OVERVIEW_CELLS = 256
"""Blocks per side of an overview: a pair-grid pane is about 800 pixels across (common practice
for a laptop screen), so a block is about 3 pixels."""


def block_size(n_tokens: int, cells: int = OVERVIEW_CELLS) -> int:
    """Tokens per block side, c = ⌈T / n⌉ (1 when the text fits the grid)."""
    return max(1, -(-n_tokens // max(1, cells)))


@dataclass(frozen=True, eq=False)
class Overview:
    """Pooled grids of some heads of one layer."""

    size: int  # c, tokens per block side
    n_tokens: int  # T
    maximum: np.ndarray  # (h, n, n) block max; NaN where a block has no visible cell
    mean: np.ndarray  # (h, n, n) block mean over visible cells; NaN likewise

    def edges(self) -> np.ndarray:
        """(n + 1,) token boundaries of the blocks (0, c, 2c, ..., T)."""
        n = self.maximum.shape[-1]
        return np.minimum(np.arange(n + 1) * self.size, self.n_tokens)


class OverviewBuilder:
    """Pools blocks of probabilities of one layer into an ``Overview`` (``add``, then ``done``)."""

    def __init__(self, n_heads: int, n_tokens: int, cells: int = OVERVIEW_CELLS):
        self.size = block_size(n_tokens, cells)
        self.n_tokens = n_tokens
        n = -(-n_tokens // self.size)
        self.maximum = np.full((n_heads, n, n), -np.inf)  # (H, n, n)
        self.total = np.zeros((n_heads, n, n))  # (H, n, n) sums over visible cells
        self.count = np.zeros((n, n), dtype=np.int64)  # visible cells per block (every head alike)

    def add(self, block: Block) -> None:
        c = self.size
        rows, keys, p = block.rows, block.keys, block.p  # p (h, b, S)
        # boundaries of the blocks inside the rows and keys of this block, as reduceat indices
        r_cuts, r_cells = _cuts(rows, c)
        k_cuts, k_cells = _cuts(keys, c)
        if block.visible is None:
            pooled_max = np.maximum.reduceat(np.maximum.reduceat(p, k_cuts, axis=2), r_cuts, axis=1)
            seen = np.outer(np.diff(np.append(r_cuts, p.shape[1])), np.diff(np.append(k_cuts, p.shape[2])))
        else:
            hidden = np.where(block.visible, p, -np.inf)  # (h, b, S): invisible cells never win
            pooled_max = np.maximum.reduceat(np.maximum.reduceat(hidden, k_cuts, axis=2), r_cuts, axis=1)
            vis = block.visible.astype(np.int64)
            seen = np.add.reduceat(np.add.reduceat(vis, k_cuts, axis=1), r_cuts, axis=0)
        pooled_sum = np.add.reduceat(np.add.reduceat(p, k_cuts, axis=2), r_cuts, axis=1)
        where = (block.heads, *np.ix_(r_cells, k_cells))  # (h, blocks of rows, blocks of keys)
        self.maximum[where] = np.maximum(self.maximum[where], pooled_max)
        self.total[where] += pooled_sum
        if block.heads.start == 0:
            self.count[np.ix_(r_cells, k_cells)] += seen

    def done(self, heads: slice | None = None) -> Overview:
        heads = heads or slice(0, self.maximum.shape[0])
        empty = self.count == 0
        maximum = np.where(empty, np.nan, self.maximum[heads]).astype(np.float32)
        mean = np.where(empty, np.nan, self.total[heads] / np.where(empty, 1, self.count)).astype(np.float32)
        return Overview(self.size, self.n_tokens, maximum, mean)


def _cuts(span: slice, c: int) -> tuple[np.ndarray, np.ndarray]:
    """(offsets inside ``span`` where a new block starts, the blocks' indices)."""
    first = span.start // c
    last = (span.stop - 1) // c
    cells = np.arange(first, last + 1)
    starts = np.maximum(cells * c, span.start) - span.start
    return starts, cells


def head_overview(
    scores: LayerScores, head: int, cells: int = OVERVIEW_CELLS, tick: Callable[[], None] | None = None
) -> Overview:
    """The overview of one head, computed block by block of rows (that head's only); ``tick``
    is called before each block (a caller's cancel check may raise there)."""
    builder = OverviewBuilder(1, scores.n_tokens, cells)
    for block in scores.blocks(own=True, heads=slice(head, head + 1)):
        if tick is not None:
            tick()
        builder.add(Block(slice(0, 1), block.rows, block.keys, block.p, block.visible))
    return builder.done()
