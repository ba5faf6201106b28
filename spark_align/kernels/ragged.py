"""Ragged-array layout shared by every kernel (pure numpy; never imports pyspark).

A *block* is a group of sentence pairs encoded once, when the corpus is ingested:

``src_offsets`` int64 (n_pairs + 1,), ``src_ids`` int32 (n_src_tokens,)
    Source tokens of every pair, flat, with CSR offsets. No NULL token is stored.
``tgt_offsets`` int64 (n_pairs + 1,), ``tgt_ids`` int32 (n_tgt_tokens,)
    The same for the target side.
``dict_keys`` int64 (n_dict,), sorted, unique
    The block's *pair dictionary*: every (source word, target word) pair that
    co-occurs in some sentence pair of the block, as ``src_id << 32 | tgt_id``,
    plus the NULL pairs ``(NULL, f)`` and ``(e, NULL)``. ``NULL_ID == 0`` on both
    sides, so key 0 ``(NULL, NULL)`` is always entry 0.
``grid_offsets`` int64 (n_pairs + 1,), ``grid`` int32 (sum of (l+1)(m+1),)
    For a pair with l source and m target tokens, ``(l+1) * (m+1)`` dictionary
    indices, row-major over (i in 0..l, j in 0..m); row 0 is the source NULL,
    column 0 the target NULL, and cell (0, 0) points at entry 0.

Why: looking up each link's current probability is the expensive part of an
E-step. The grid turns that lookup into one gather ``probs[grid]`` from an
array of n_dict floats that fits in cache; the sort that builds it runs once at
ingestion, not once per iteration. Both directions share one grid (the reverse
direction reads it in the other order), and per-block dictionaries are exactly the
parameter slice a block needs, so tables can be shipped per block.

A *view* is a block seen from one direction: ``cond`` is the conditioning side
(rows, with NULL at row 0) and ``gen`` the generated side (columns 1..m; column
0 is ignored). The forward direction p(target | source) reads the grid row by
row, the reverse direction p(source | target) column by column: every model's
E-step and decoding step through the stored grid in either order
(``grid_steps``). ``View.cells``, the transposed grid, is made only when asked
for (tests compare the kernels against it); no kernel asks.
"""
from __future__ import annotations

from dataclasses import dataclass
from functools import cached_property

import numpy as np
from numba import njit

NULL_ID = 0


def lengths(offsets: np.ndarray) -> np.ndarray:
    """Row lengths (int64) of a CSR offsets array."""
    return np.diff(offsets).astype(np.int64, copy=False)


def offsets_from_lengths(lens: np.ndarray) -> np.ndarray:
    """CSR offsets (int64, length n+1) for rows of the given lengths."""
    out = np.zeros(len(lens) + 1, dtype=np.int64)
    np.cumsum(lens, out=out[1:])
    return out


def row_of(offsets: np.ndarray) -> np.ndarray:
    """For every element of a CSR array, the index of its row (int64)."""
    lens = lengths(offsets)
    return np.repeat(np.arange(len(lens), dtype=np.int64), lens)


def position_in_row(offsets: np.ndarray) -> np.ndarray:
    """For every element of a CSR array, its position within its row (int64)."""
    n = int(offsets[-1])
    return np.arange(n, dtype=np.int64) - np.repeat(offsets[:-1], lengths(offsets))


def make_key(src_ids: np.ndarray, tgt_ids: np.ndarray) -> np.ndarray:
    """Pair keys ``src << 32 | tgt`` (int64)."""
    return (src_ids.astype(np.int64) << 32) | tgt_ids.astype(np.int64)


def distinct(keys: np.ndarray) -> np.ndarray:
    """The distinct values of int64 ``keys``, ascending: ``np.unique(keys)`` without its hashing, which
    for 64-bit keys of wide range took 0.43 s for 1M keys and 8 s for 7.6M (numpy 2.4) against 0.01 s
    and 0.1 s for a stable sort (fastest over a few sorted runs, as block dictionaries are) and a pass
    dropping repeats."""
    keys = np.sort(np.asarray(keys), kind="stable")
    return keys[np.concatenate([[True], keys[1:] != keys[:-1]])] if len(keys) else keys


def split_key(keys: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Inverse of :func:`make_key`: (src_ids, tgt_ids), both int32."""
    return (keys >> 32).astype(np.int32), (keys & 0xFFFFFFFF).astype(np.int32)


@dataclass(frozen=True)
class Block:
    """One encoded block of sentence pairs (see the module docstring)."""

    src_offsets: np.ndarray
    src_ids: np.ndarray
    tgt_offsets: np.ndarray
    tgt_ids: np.ndarray
    dict_keys: np.ndarray | None  # None: read without its keys (an E-step that knows their positions)
    grid_offsets: np.ndarray
    grid: np.ndarray

    @property
    def n_pairs(self) -> int:
        return len(self.src_offsets) - 1

    @property
    def n_dict(self) -> int:
        """Dictionary entries; without the keys, one more than the grid's largest index (the grid
        points at every entry: the dictionary is built from it)."""
        if self.dict_keys is not None:
            return len(self.dict_keys)
        return int(self.grid.max()) + 1 if len(self.grid) else 0

    def view(self, direction: str) -> "View":
        """The block seen from ``direction`` ('forward' or 'reverse')."""
        src_len, tgt_len = lengths(self.src_offsets), lengths(self.tgt_offsets)
        if direction == "forward":
            return View(src_len, tgt_len, self.grid_offsets, self.grid,
                        self.src_offsets, self.src_ids, self.tgt_offsets, self.tgt_ids)
        if direction == "reverse":
            return View(tgt_len, src_len, self.grid_offsets, self.grid,
                        self.tgt_offsets, self.tgt_ids, self.src_offsets, self.src_ids, gen_major=True)
        raise ValueError(f"direction must be 'forward' or 'reverse', not {direction!r}")


@dataclass(frozen=True)
class View:
    """A block from one direction: ``cells`` is row-major (cond_len+1) x (gen_len+1).

    ``grid`` is the block's grid as stored: ``cells`` itself, or with ``gen_major`` (the reverse
    direction) row-major (gen_len+1) x (cond_len+1), ``cells`` then being its transpose, made on
    first use. A kernel that reads cells in either order takes ``grid`` and skips the transpose.
    """

    cond_len: np.ndarray      # int64 (n_pairs,)
    gen_len: np.ndarray       # int64 (n_pairs,)
    cell_offsets: np.ndarray  # int64 (n_pairs + 1,)
    grid: np.ndarray          # int32 dictionary indices
    cond_offsets: np.ndarray
    cond_ids: np.ndarray
    gen_offsets: np.ndarray
    gen_ids: np.ndarray
    gen_major: bool = False

    @cached_property
    def cells(self) -> np.ndarray:
        if not self.gen_major:
            return self.grid
        return transpose_grid(self.gen_len, self.cond_len, self.cell_offsets, self.grid)

    @property
    def n_pairs(self) -> int:
        return len(self.cond_len)

    def gen_cells(self) -> "GenCells":
        """Index arrays of the cells that matter: columns 1..gen_len of every row."""
        return gen_cells(self.cond_len, self.gen_len, self.cell_offsets)


@njit(cache=True, nogil=True, inline="always")
def grid_steps(cond_len, gen_len, gen_major):  # pragma: no cover - compiled into the kernels
    """(cond_step, gen_step) of one pair's cells in ``View.grid``: cell (cond i, gen j) is
    ``grid[base + i * cond_step + j * gen_step]``, for a grid stored cond-major (the forward direction)
    or gen-major (the reverse direction, ``View.gen_major``)."""
    if gen_major:
        return 1, cond_len + 1
    return gen_len + 1, 1


class GenCells:
    """Every (gen token, cond position) link of a view, token-major: every generated token in pair
    order, then cond positions 0..l (0 = NULL), so token ``k``'s link at position ``i`` is link
    ``token_starts[k] + i``.

    Kernels that walk links in this order need only the view's lengths (``cond_len``, ``gen_len``):
    per-token argmax, links above a threshold. The per-link index arrays are made on first use, in
    one compiled pass: ``flat`` int64 (n_links,) index into the view's ``cells``, ``token`` int64
    (n_links,) index of the generated token, ``cond_pos`` int64 (n_links,) the row 0..l. Model 1's
    and the HMM's decoding never make them (a fifth of their posteriors, argmax and selection).
    """

    def __init__(self, cond_len: np.ndarray, gen_len: np.ndarray, cell_offsets: np.ndarray) -> None:
        self.cond_len = np.ascontiguousarray(cond_len, np.int64)
        self.gen_len = np.ascontiguousarray(gen_len, np.int64)
        self.cell_offsets = np.ascontiguousarray(cell_offsets, np.int64)
        self.n_tokens = int(self.gen_len.sum())
        self.n_links = int((self.gen_len * (self.cond_len + 1)).sum())

    @cached_property
    def token_starts(self) -> np.ndarray:
        """Each generated token's first link, int64 (n_tokens,)."""
        rows = np.repeat(self.cond_len + 1, self.gen_len)
        starts = np.zeros(len(rows), np.int64)
        np.cumsum(rows[:-1], out=starts[1:])
        return starts

    @cached_property
    def _arrays(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        flat, token, cond_pos = (np.empty(self.n_links, np.int64) for _ in range(3))
        _gen_cells(self.cond_len, self.gen_len, self.cell_offsets, flat, token, cond_pos)
        return flat, token, cond_pos

    @property
    def flat(self) -> np.ndarray:
        return self._arrays[0]

    @property
    def token(self) -> np.ndarray:
        return self._arrays[1]

    @property
    def cond_pos(self) -> np.ndarray:
        return self._arrays[2]


def gen_cells(cond_len: np.ndarray, gen_len: np.ndarray, cell_offsets: np.ndarray) -> GenCells:
    """The links of a view (:class:`GenCells`). Its index arrays come from one compiled pass: the numpy
    version, built from repeats and gathers over link-sized arrays, took 0.22 s against 0.047 s for
    16k pairs, and a seventh of the output pass's decoding."""
    return GenCells(cond_len, gen_len, cell_offsets)


@njit(cache=True, nogil=True)
def _gen_cells(cond_len, gen_len, cell_offsets, flat, token, cond_pos):  # pragma: no cover
    k = 0
    t = 0
    for p in range(len(gen_len)):
        m = gen_len[p]
        rows = cond_len[p] + 1
        width = m + 1
        base = cell_offsets[p]
        for j in range(1, m + 1):
            for i in range(rows):
                flat[k] = base + i * width + j
                token[k] = t
                cond_pos[k] = i
                k += 1
            t += 1
    return t


def links_at_least(gc: GenCells, post: np.ndarray, threshold: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(token, cond_pos, post) of the links of ``gc`` whose posterior (``post``, one per link in
    ``gc``'s order) reaches ``threshold``, NULL (cond_pos 0) left out, in their order: two compiled
    passes over the view's lengths (count, copy), with no per-link index arrays."""
    post = np.ascontiguousarray(post, np.float64)
    if len(post) != gc.n_links:
        raise ValueError(f"{len(post)} posteriors for {gc.n_links} links")
    m = _links_at_least(gc.cond_len, gc.gen_len, post, float(threshold), None)
    out = (np.empty(m, np.int64), np.empty(m, np.int64), np.empty(m, np.float64))
    _links_at_least(gc.cond_len, gc.gen_len, post, float(threshold), out)
    return out


@njit(cache=True, nogil=True)
def _links_at_least(cond_len, gen_len, post, threshold, out):  # pragma: no cover
    k = 0  # the token's first link
    token = 0
    m = 0
    for p in range(len(gen_len)):
        rows = cond_len[p] + 1
        for _j in range(gen_len[p]):
            for i in range(1, rows):
                if post[k + i] >= threshold:
                    if out is not None:
                        out[0][m] = token
                        out[1][m] = i
                        out[2][m] = post[k + i]
                    m += 1
            k += rows
            token += 1
    return m


def links_by_pair(gen_offsets: np.ndarray, token: np.ndarray, cond_pos: np.ndarray, post: np.ndarray, *,
                  forward: bool):
    """Links of one direction, given token-major (``token`` a generated token's flat index, non-decreasing;
    ``cond_pos`` 1-based, 0 the NULL word), as flat (pair, source index, target index, posterior) sorted by
    (pair, source, target), in one compiled pass; None if they do not come token-major (a token going
    down, or cond positions not increasing within a token), for the caller to sort.

    ``gen_offsets`` are the generated side's CSR offsets: the target side's for the forward direction
    (source index = cond_pos - 1, and each pair's links are counting-sorted by it, stably), the source
    side's for the reverse (links already in order). Replaces the pairs of every token, the int64 link
    keys, a check that they increase and a sort within pairs in numpy, a quarter of decoding a block.
    """
    token, cond_pos = np.ascontiguousarray(token, np.int64), np.ascontiguousarray(cond_pos, np.int64)
    post = np.ascontiguousarray(post, np.float64)
    out = (np.empty(len(token), np.int64), np.empty(len(token), np.int64), np.empty(len(token), np.int64),
           np.empty(len(token), np.float64))
    if len(token) == 0:
        return out
    max_cond = int(cond_pos.max())
    if max_cond < 0 or not _links_by_pair(np.ascontiguousarray(gen_offsets, np.int64), token, cond_pos, post,
                                          bool(forward), max_cond, *out):
        return None
    return out


@njit(cache=True, nogil=True)
def _links_by_pair(gen_offsets, token, cond_pos, post, forward, max_cond, pair, src_i, tgt_j,
                   out_post):  # pragma: no cover - compiled
    # Token-major input with cond positions increasing within each token has no repeated link, and is
    # (source, target) ordered within each pair for the reverse; a stable sort by source keeps that
    # for the forward. Checked in the pass that finds each pair's run of links.
    n = len(token)
    starts = np.zeros(max_cond + 2, np.int64)
    p = 0
    a = 0
    while a < n:
        t = token[a]
        if t < 0 or t >= gen_offsets[len(gen_offsets) - 1]:
            return False
        while gen_offsets[p + 1] <= t:
            p += 1
        end = gen_offsets[p + 1]
        base = gen_offsets[p]
        prev_t, prev_c = t, np.int64(-1)
        b = a  # the run of pair p's links: [a, b)
        top = np.int64(0)
        while b < n:
            t = token[b]
            c = cond_pos[b]
            if t >= end:
                break
            if t < prev_t or (t == prev_t and c <= prev_c) or c < 0:
                return False
            prev_t, prev_c = t, c
            if forward:
                starts[c + 1] += 1
                top = max(top, c)
            else:
                pair[b] = p
                src_i[b] = t - base
                tgt_j[b] = c - 1
                out_post[b] = post[b]
            b += 1
        if forward:  # wanted source-major: a counting sort by cond position, stable (targets stay in order)
            for c in range(1, top + 2):
                starts[c] += starts[c - 1]
            for k in range(a, b):
                c = cond_pos[k]
                at = a + starts[c]
                starts[c] += 1
                pair[at] = p
                src_i[at] = c - 1
                tgt_j[at] = token[k] - base
                out_post[at] = post[k]
            starts[:top + 2] = 0
        a = b
    return True


def values_at_links(pair: np.ndarray, src_i: np.ndarray, tgt_j: np.ndarray, at_pair: np.ndarray,
                    at_src: np.ndarray, at_tgt: np.ndarray, at_value: np.ndarray, default: float):
    """The value each link (pair, source, target) has in another list of links (``at_*``, with
    ``at_value``), ``default`` where it is absent: one compiled merge of the two lists, both sorted by
    (pair, source, target) and without repeats. None if either is not, for the caller to search.
    Replaces int64 link keys, an argsort and a search per link, a sixth of decoding a block."""
    args = [np.ascontiguousarray(a, np.int64) for a in (pair, src_i, tgt_j, at_pair, at_src, at_tgt)]
    out = np.empty(len(pair), np.float64)
    if not _values_at_links(*args, np.ascontiguousarray(at_value, np.float64), float(default), out):
        return None
    return out


@njit(cache=True, nogil=True, inline="always")
def _link_before(p, s, t, q, u, v):  # pragma: no cover - compiled
    # (p, s, t) < (q, u, v), lexicographically
    return p < q or (p == q and (s < u or (s == u and t < v)))


@njit(cache=True, nogil=True)
def _values_at_links(pair, src_i, tgt_j, at_pair, at_src, at_tgt, at_value, default, out):  # pragma: no cover
    for k in range(1, len(at_pair)):
        if not _link_before(at_pair[k - 1], at_src[k - 1], at_tgt[k - 1], at_pair[k], at_src[k], at_tgt[k]):
            return False
    j = 0
    m = len(at_pair)
    for i in range(len(pair)):
        p, s, t = pair[i], src_i[i], tgt_j[i]
        if i > 0 and not _link_before(pair[i - 1], src_i[i - 1], tgt_j[i - 1], p, s, t):
            return False
        while j < m and _link_before(at_pair[j], at_src[j], at_tgt[j], p, s, t):
            j += 1
        out[i] = at_value[j] if j < m and at_pair[j] == p and at_src[j] == s and at_tgt[j] == t else default
    return True


def transpose_grid(src_len: np.ndarray, tgt_len: np.ndarray, grid_offsets: np.ndarray,
                   grid: np.ndarray) -> np.ndarray:
    """Grid re-laid row-major over (j in 0..m, i in 0..l) for the reverse direction.

    One compiled pass (numba): the reverse direction needs it for every block in every iteration,
    and the index arithmetic in numpy cost as much as the Model 1 kernel itself.
    """
    out = np.empty(len(grid), dtype=grid.dtype)
    if len(grid):
        _transpose(np.ascontiguousarray(src_len, np.int64), np.ascontiguousarray(tgt_len, np.int64),
                   np.ascontiguousarray(grid_offsets, np.int64), np.ascontiguousarray(grid), out)
    return out


@njit(cache=True, nogil=True)
def _transpose(src_len, tgt_len, grid_offsets, grid, out):  # pragma: no cover - compiled
    for p in range(len(src_len)):
        rows = src_len[p] + 1
        cols = tgt_len[p] + 1
        base = grid_offsets[p]
        for j in range(cols):
            for i in range(rows):
                out[base + j * rows + i] = grid[base + i * cols + j]


def build_block(src_offsets: np.ndarray, src_ids: np.ndarray,
                tgt_offsets: np.ndarray, tgt_ids: np.ndarray) -> Block:
    """Encode pairs into a :class:`Block` (dictionary and grid) without token loops."""
    src_offsets = np.asarray(src_offsets, dtype=np.int64)
    tgt_offsets = np.asarray(tgt_offsets, dtype=np.int64)
    src_ids = np.asarray(src_ids, dtype=np.int32)
    tgt_ids = np.asarray(tgt_ids, dtype=np.int32)
    src_len, tgt_len = lengths(src_offsets), lengths(tgt_offsets)
    rows, cols = src_len + 1, tgt_len + 1
    grid_offsets = offsets_from_lengths(rows * cols)
    n = int(grid_offsets[-1])
    pair = row_of(grid_offsets)
    pos = np.arange(n, dtype=np.int64) - grid_offsets[pair]
    i, j = np.divmod(pos, cols[pair])
    # Source word at row i (NULL at row 0); target word at column j (NULL at column 0).
    src_word = np.where(i > 0, src_ids[np.maximum(src_offsets[pair] + i - 1, 0)] if len(src_ids) else 0, 0)
    tgt_word = np.where(j > 0, tgt_ids[np.maximum(tgt_offsets[pair] + j - 1, 0)] if len(tgt_ids) else 0, 0)
    keys = make_key(src_word, tgt_word)
    dict_keys, inverse = np.unique(np.concatenate([np.zeros(1, np.int64), keys]), return_inverse=True)
    grid = inverse[1:].astype(np.int32)
    return Block(src_offsets, src_ids, tgt_offsets, tgt_ids, dict_keys, grid_offsets, grid)


def check_block(block: Block, *, full: bool = False) -> None:
    """Validate a block: O(1) shape checks always, O(n) scans when ``full``."""
    n = block.n_pairs
    for name in ("tgt_offsets", "grid_offsets"):
        if len(getattr(block, name)) != n + 1:
            raise ValueError(f"{name} has {len(getattr(block, name))} entries, expected {n + 1}")
    if int(block.src_offsets[-1]) != len(block.src_ids) or int(block.tgt_offsets[-1]) != len(block.tgt_ids):
        raise ValueError("token offsets do not end at the number of tokens")
    if int(block.grid_offsets[-1]) != len(block.grid):
        raise ValueError("grid offsets do not end at the grid size")
    if len(block.dict_keys) == 0 or block.dict_keys[0] != 0:
        raise ValueError("dictionary entry 0 must be the (NULL, NULL) key")
    if full:
        expect = (lengths(block.src_offsets) + 1) * (lengths(block.tgt_offsets) + 1)
        if not np.array_equal(lengths(block.grid_offsets), expect):
            raise ValueError("grid sizes are not (l+1)*(m+1)")
        if len(block.grid) and (block.grid.min() < 0 or block.grid.max() >= len(block.dict_keys)):
            raise ValueError("grid index outside the dictionary")
        if np.any(np.diff(block.dict_keys) <= 0):
            raise ValueError("dictionary keys are not sorted and unique")
