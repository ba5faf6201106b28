"""Model 2's posteriors written link by link in numpy, for tests: the oracle the compiled kernels
(``spark_align.kernels.ibm2``) are held to. Every function takes or returns one value per link of a
view's :class:`~spark_align.kernels.ragged.GenCells` (token-major, cond positions 0..l)."""
from __future__ import annotations

import numpy as np

from spark_align.kernels import ibm2
from spark_align.kernels.ragged import GenCells, View, offsets_from_lengths


def link_geometry(view: View, gc: GenCells) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(j, l, m) of every link of ``gc``: int64 arrays, shape (n_links,); j counts from 1."""
    token_pair = np.repeat(np.arange(view.n_pairs, dtype=np.int64), view.gen_len)
    token_offsets = offsets_from_lengths(view.gen_len)
    token_j = np.arange(gc.n_tokens, dtype=np.int64) - token_offsets[token_pair] + 1
    pair = token_pair[gc.token]
    return token_j[gc.token], view.cond_len[pair], view.gen_len[pair]


def position_bin(pos: np.ndarray, length: np.ndarray, cap: int) -> np.ndarray:
    """Bin 1..min(length, cap) of positions 1..length (identity while length <= cap)."""
    return np.where(length > cap, (pos - 1) * cap // np.maximum(length, 1) + 1, pos)


def bin_size(bin_: np.ndarray, length: np.ndarray, cap: int) -> np.ndarray:
    """How many positions of 1..length fall into ``bin_`` (1 while length <= cap), int64."""
    def ceil_div(num):
        return -(-num // cap)
    return np.where(length > cap, ceil_div(bin_ * length) - ceil_div((bin_ - 1) * length), 1)


def table_index(cond_pos: np.ndarray, j: np.ndarray, l: np.ndarray, m: np.ndarray,
                cap: int) -> tuple[np.ndarray, np.ndarray]:
    """Table entry and bin size of links (i, j, l, m): (int64, int64), shape (n_links,)."""
    offsets, _ = ibm2.table_offsets(cap)
    lc, mc = np.minimum(l, cap), np.minimum(m, cap)
    ib = np.where(cond_pos > 0, position_bin(cond_pos, l, cap), 0)
    jb = position_bin(j, m, cap)
    size = np.where(cond_pos > 0, bin_size(ib, l, cap), 1)
    return offsets[lc, mc] + (jb - 1) * (lc + 1) + ib, size


def align_probs(view: View, gc: GenCells, table: np.ndarray, cap: int) -> tuple[np.ndarray, np.ndarray]:
    """a(i | j, l, m) of every link and its table entry: (float64, int64), (n_links,)."""
    j, l, m = link_geometry(view, gc)
    idx, size = table_index(gc.cond_pos, j, l, m, cap)
    return table[idx] / size, idx


def diag_feature(cond_pos: np.ndarray, j: np.ndarray, l: np.ndarray, m: np.ndarray) -> np.ndarray:
    """h = -|i/l - j/m| for real links (0 for NULL links and l = 0): float64 (n_links,)."""
    real = cond_pos > 0
    return np.where(real, -np.abs(cond_pos / np.maximum(l, 1) - j / np.maximum(m, 1)), 0.0)


def diag_align_probs(view: View, gc: GenCells, p_null: float, lam: float) -> np.ndarray:
    """a(i | j, l, m) of every link: float64 (n_links,)."""
    j, l, m = link_geometry(view, gc)
    h = diag_feature(gc.cond_pos, j, l, m)
    real = gc.cond_pos > 0
    # h <= 0, so exp never overflows; every token with l >= 1 has a link with h >= -1/l.
    w = np.where(real, np.exp(lam * h), 0.0)
    z = np.bincount(gc.token, weights=w, minlength=gc.n_tokens)[gc.token]
    real_part = np.divide((1.0 - p_null) * w, z, out=np.zeros_like(w), where=real)
    return np.where(real, real_part, np.where(l == 0, 1.0, p_null))


def diag_context_index(j: np.ndarray, l: np.ndarray, m: np.ndarray, cap: int) -> np.ndarray:
    """Context (bin(j), min(l,cap), min(m,cap)) of tokens with l >= 1: int64 index into
    an array of ``ibm2.diag_n_contexts(cap)``; layout [l'-1][m'-1 block][j'-1]."""
    lc, mc = np.minimum(l, cap), np.minimum(m, cap)
    jb = position_bin(j, m, cap)
    per_l = cap * (cap + 1) // 2
    return (lc - 1) * per_l + (mc - 1) * mc // 2 + (jb - 1)


def posteriors_and_loglik(view: View, t: np.ndarray, a: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(link posteriors, log-likelihood per pair) given every link's alignment probability ``a``:
    post = t a / (the token's t a summed), loglik = sum over the pair's tokens of log that sum."""
    gc = view.gen_cells()
    score = t[view.cells[gc.flat]] * a
    denom = np.bincount(gc.token, weights=score, minlength=gc.n_tokens)
    token_pair = np.repeat(np.arange(view.n_pairs, dtype=np.int64), view.gen_len)
    return score / denom[gc.token], np.bincount(token_pair, weights=np.log(denom), minlength=view.n_pairs)
