"""One layer's attention probabilities, re-derived on demand in float64, block by block.

For layer l of one text, query head h (key/value group g = h // (H / G)), query row i and key j

    P_h = softmax(Q_h K_gᵀ · scale + terms + M)                    (Vaswani et al. 2017, Eq. 1)

with the score terms of ``viewer.core.terms`` (relative-position terms, soft-capping) and M = 0
where row i may see key j and −∞ elsewhere (causal rule, windows). Nothing here ever holds a
head's whole T × T matrix unless asked for it: rows are computed in *blocks* of query rows, and
each block only over its *key span*, the contiguous range of keys any of its rows can see
(``key_span``). Every visible key of a row lies inside the span, so the softmax over the span is
the softmax over the whole row; keys outside it are exactly 0. A causal block of rows [a, b)
spans keys [0, b), a windowed one [a − before, b + after), which is what makes long texts
affordable: a local layer of 128 keys each side costs 257 keys per row, not T.

A ``LayerScores`` can also carry the model's own probabilities of the layer (``own``, when the
eager kernel produced them for a short text); ``blocks(own=True)`` then hands out the model's
own numbers instead of re-deriving them, which is what every metric of a short text reads.

Shapes: H query heads, G key/value heads, T tokens, d head size, b rows of a block, S keys of
a span, R rows of a position table.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass

import numpy as np

from viewer.core.softmax import softmax_in_place
from viewer.core.terms import ScoreTerms, p2c_table, soft_cap, visible_rows

# float64 entries of one block of scores: 2^17 = 1 MiB, which stays in a core's L2 cache
# (measured in tests/benchmarks/bench_recording.py against whole-layer tensors)
BLOCK_ENTRIES = 1 << 17
# multiply-adds of one matrix product of the p2c table computed at once
GEMM_SINGLE_THREAD = 1 << 18

_blas_limited = False


def one_blas_thread() -> None:
    """Run numpy's BLAS on one thread, from now on, in this process (once; threadpoolctl).

    Every product here is a block small enough for one core, computed in threads of our own
    (``viewer.core.attention.run_parallel``), while the model's own work runs on torch's
    thread pool. BLAS threads of numpy left spinning after a product slowed the model's next
    forward by 2-3x, and two of them fighting over a block slowed it tenfold under load
    (measured in tests/benchmarks/bench_families.py and bench_long.py)."""
    global _blas_limited
    if not _blas_limited:
        from threadpoolctl import ThreadpoolController

        ThreadpoolController().limit(limits=1, user_api="blas")
        _blas_limited = True


def span_bounds(first, last, n_tokens: int, causal: bool, window: tuple[int, int] | None):
    """(start, stop) of the keys that query rows first..last can see together; ``first`` and
    ``last`` are ints or int arrays (one span per element).

    Causal rows see j <= i; a window (before, after) limits them to i − before <= j <= i + after
    (a side of −1 does not limit). The span is the union over the rows.
    """
    start, stop = 0 * first, 0 * last + n_tokens  # ints stay ints: a block's span is asked often
    if causal:
        stop = last + 1
    if window is not None:
        before, after = window
        if before >= 0:
            start = np.maximum(0, first - before)
        if after >= 0:
            stop = np.minimum(stop, last + after + 1)
    return start, stop


def key_span(rows: slice, n_tokens: int, causal: bool, window: tuple[int, int] | None) -> slice:
    """The contiguous keys that query rows [rows.start, rows.stop) can see, together
    (``span_bounds`` of the block's first and last row)."""
    start, stop = (int(x) for x in span_bounds(rows.start, rows.stop - 1, n_tokens, causal, window))
    return slice(start, max(start, stop))


@dataclass(frozen=True, eq=False)
class Block:
    """Probabilities of some heads, some query rows and their key span (float64)."""

    heads: slice  # query heads h
    rows: slice  # query rows i
    keys: slice  # key span: every key these rows see lies inside it
    p: np.ndarray  # (h, b, S) probabilities, 0 where a key is not visible
    visible: np.ndarray | None  # (b, S) bool, None when every row sees every key of the span


def row_blocks(n_rows: int, row_entries: int, most_entries: int = BLOCK_ENTRIES, row_products: int = 0):
    """Slices of query rows, as equal as can be, of at most ``most_entries`` entries each (one row
    costs ``row_entries``), and, when ``row_products`` (multiply-adds per row of one matrix
    product) is given, small enough that OpenBLAS runs each product on the calling thread."""
    most = max(1, most_entries // max(1, row_entries))
    if row_products:
        most = min(most, max(1, GEMM_SINGLE_THREAD // row_products))
    count = -(-n_rows // most)  # ceil
    size = -(-n_rows // max(1, count))
    for start in range(0, n_rows, size):
        yield slice(start, min(n_rows, start + size))


class LayerScores:
    """The attention of one layer of one text, computed for any rows when asked (float64).

    q: (H, T, d) queries after rotary; k: (G, T, d) keys (G divides H); ``terms`` the
    recording's score terms, of which layer ``layer`` is used; own: (H, T, T) the model's own
    probabilities of this layer, or None.
    """

    def __init__(
        self,
        q: np.ndarray,
        k: np.ndarray,
        scale: float,
        causal: bool,
        terms: ScoreTerms,
        layer: int,
        own: np.ndarray | None = None,
    ):
        self.n_heads, self.n_tokens, self.head_dim = (int(n) for n in q.shape)
        if self.n_heads % k.shape[0]:
            raise ValueError(f"{self.n_heads} query heads cannot share {k.shape[0]} key heads")
        self.n_kv_heads = int(k.shape[0])
        self.groups = self.n_heads // self.n_kv_heads  # query heads per key/value head
        self.q, self.k = q, k
        self.scale, self.causal, self.terms, self.layer = float(scale), causal, terms, layer
        self.window = terms.layer_window(layer)
        self.cap = terms.layer_cap(layer)
        self.own = own
        one_blas_thread()
        self._k64: dict[int, np.ndarray] = {}  # group -> (d, T) float64 keys, made when first used
        self._p2c: np.ndarray | None = None

    def forget(self) -> None:
        """Drop the float64 copies made for the re-derivation (recomputed if asked again): a
        caller walking every layer of a long text keeps one layer's, not all of them (12 key
        heads of 8,192 tokens are 50 MB a layer)."""
        self._k64 = {}
        self._p2c = None

    # -- geometry ----------------------------------------------------------------------------
    def keys(self, rows: slice) -> slice:
        return key_span(rows, self.n_tokens, self.causal, self.window)

    def visible(self, rows: slice, keys: slice) -> np.ndarray | None:
        """(b, S) bool: which keys of the span each row sees; None when all of them."""
        part = visible_rows(rows, self.n_tokens, self.causal, self.window, keys)
        return None if part is None or part.all() else part

    def visible_counts(self, rows: slice) -> np.ndarray:
        """(b,) int64: how many keys each row sees."""
        full = visible_rows(rows, self.n_tokens, self.causal, self.window)
        if full is None:
            return np.full(rows.stop - rows.start, self.n_tokens, dtype=np.int64)
        return full.sum(axis=1)

    def group_heads(self, group: int) -> slice:
        return slice(group * self.groups, (group + 1) * self.groups)

    # -- the re-derivation -------------------------------------------------------------------
    def _keys64(self, group: int) -> np.ndarray:
        k = self._k64.get(group)
        if k is None:
            k = self._k64[group] = np.ascontiguousarray(self.k[group].T, dtype=np.float64)  # (d, T)
        return k

    def derive(self, heads: slice, rows: slice, keys: slice, visible: np.ndarray | None) -> np.ndarray:
        """(h, b, S) float64 softmax of the scores of ``heads`` (within one key/value group),
        query rows ``rows`` over the key span ``keys`` (which must hold every visible key);
        ``visible``: the span's (b, S) ``visible`` mask (None: every key of the span)."""
        group = heads.start // self.groups
        if (heads.stop - 1) // self.groups != group:
            raise ValueError(f"heads {heads} are not in one key/value group")
        h, b = heads.stop - heads.start, rows.stop - rows.start
        qb = self.q[heads, rows].astype(np.float64).reshape(h * b, self.head_dim)  # (h·b, d)
        qb *= self.scale  # scaling q (h·b·d) is cheaper than scaling the scores (h·b·S)
        s = (qb @ self._keys64(group)[:, keys]).reshape(h, b, -1)  # (h, b, S)
        self._add_relative(s, heads, rows, keys, qb.reshape(h, b, self.head_dim))
        soft_cap(s, self.cap)
        if visible is not None:
            np.copyto(s, -np.inf, where=~visible)
        softmax_in_place(s)
        return s

    def _add_relative(self, s: np.ndarray, heads: slice, rows: slice, keys: slice, q_scaled: np.ndarray):
        """Add the c2p, p2c and bias terms of ``viewer.core.terms`` to scores (h, b, S)."""
        terms = self.terms
        if terms.rel_index is None:
            return
        index = terms.rel_index[rows, keys]  # (b, S) δ_ij
        if terms.pos_key is not None:  # c2p: scale · q_i · Kʳ[δ_ij]
            table = np.asarray(terms.pos_key[self.layer, heads], dtype=np.float64)  # (h, R, d)
            c2p = np.matmul(q_scaled, table.transpose(0, 2, 1))  # (h, b, R)
            s += np.take_along_axis(c2p, np.broadcast_to(index, (c2p.shape[0], *index.shape)), axis=2)
        if terms.pos_query is not None:  # p2c: scale · k_j · Qʳ[δ_ij]
            if self._p2c is None:
                self._p2c = p2c_table(terms, self.layer, self.k, self.scale, self.n_heads, GEMM_SINGLE_THREAD)
            cols = np.arange(keys.start, keys.stop)[None, :]  # (1, S) key j
            s += self._p2c[heads][:, cols, index]  # (h, b, S)
        if terms.bias is not None:
            s += np.asarray(terms.bias[self.layer, heads], dtype=np.float64)[:, index]  # (h, b, S)

    # -- what callers ask for ----------------------------------------------------------------
    def block(
        self, heads: slice, rows: slice, own: bool = True, visible: np.ndarray | None | bool = True
    ) -> Block:
        """Probabilities of ``heads`` (one key/value group) for ``rows`` over their key span:
        the model's own when it gave them and ``own`` is set, else re-derived; ``visible``: the
        rows' ``visible`` mask over their span when the caller has it (True: make it)."""
        keys = self.keys(rows)
        if visible is True:
            visible = self.visible(rows, keys)
        if own and self.own is not None:
            p = self.own[heads, rows, keys].astype(np.float64)
        else:
            p = self.derive(heads, rows, keys, visible)
        return Block(heads, rows, keys, p, visible)

    def row_blocks(self, rows: slice | None = None, heads: int | None = None, entries: int = BLOCK_ENTRIES):
        """Slices of query rows (of ``rows``, default all) whose scores for ``heads`` heads
        (default one key/value group's) number about ``entries`` each; a windowed layer's rows
        are priced at their window, not at T."""
        rows = rows or slice(0, self.n_tokens)
        width = self.widest_row()
        per_block = max(1, entries // ((heads or self.groups) * width))
        if width < self.n_tokens:  # b rows of a window span b + width − 1 keys: keep b <= width
            per_block = min(per_block, width)
        for start in range(rows.start, rows.stop, per_block):
            yield slice(start, min(rows.stop, start + per_block))

    def blocks(
        self, own: bool = True, entries: int = BLOCK_ENTRIES, heads: slice | None = None
    ) -> Iterator[Block]:
        """Every row once, for every head (per key/value group) or for ``heads`` (inside one
        group), in blocks of about ``entries`` scores (``row_blocks``)."""
        parts = [self.group_heads(g) for g in range(self.n_kv_heads)] if heads is None else [heads]
        for part in parts:
            for rows in self.row_blocks(heads=part.stop - part.start, entries=entries):
                yield self.block(part, rows, own)

    def widest_row(self) -> int:
        """Most keys one row can see: T, or the width of a bounded window."""
        before = after = self.n_tokens
        if self.window is not None:
            before = self.window[0] if self.window[0] >= 0 else before
            after = self.window[1] if self.window[1] >= 0 else after
        if self.causal:
            after = 0
        return min(self.n_tokens, before + after + 1)

    def span_widths(self) -> np.ndarray:
        """(T,) int64: how many keys each row's span holds (``span_bounds`` of the row alone),
        the work of re-deriving it: i + 1 for a causal row, its window's width for a windowed one."""
        i = np.arange(self.n_tokens, dtype=np.int64)
        start, stop = span_bounds(i, i, self.n_tokens, self.causal, self.window)
        return np.maximum(stop - start, 0)

    def split_rows(self, parts: int) -> list[slice]:
        """At most ``parts`` contiguous slices of rows with about equal work (``span_widths``):
        an even split of a causal layer gives the last part three times the first's work."""
        work = np.cumsum(self.span_widths())
        total = int(work[-1]) if work.size else 0
        cuts = [0]
        for k in range(1, max(1, int(parts))):
            cuts.append(int(np.searchsorted(work, total * k / parts, side="left")) + 1)
        cuts.append(self.n_tokens)
        return [slice(a, b) for a, b in zip(cuts, cuts[1:], strict=False) if b > a]

    def rows(self, rows: slice, heads: slice | None = None, own: bool = True) -> np.ndarray:
        """(h, b, T) float64 full rows of ``heads`` (default all), zeros outside the span."""
        heads = heads or slice(0, self.n_heads)
        out = np.zeros((heads.stop - heads.start, rows.stop - rows.start, self.n_tokens))
        for group in range(heads.start // self.groups, (heads.stop - 1) // self.groups + 1):
            part = self.group_heads(group)
            part = slice(max(part.start, heads.start), min(part.stop, heads.stop))
            b = self.block(part, rows, own)
            out[part.start - heads.start : part.stop - heads.start, :, b.keys] = b.p
        return out

    def row(self, i: int, own: bool = True) -> np.ndarray:
        """(H, T) float64 every head's attention from query row i."""
        return self.rows(slice(i, i + 1), own=own)[:, 0]

    def head(self, head: int, own: bool = True) -> np.ndarray:
        """(T, T) float64 one head's whole matrix (mind its size: T² entries)."""
        out = np.zeros((self.n_tokens, self.n_tokens))
        heads = slice(head, head + 1)
        for rows in row_blocks(self.n_tokens, self.n_tokens):
            b = self.block(heads, rows, own)
            out[rows, b.keys] = b.p[0]
        return out
