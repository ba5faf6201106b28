"""IBM Model 1 kernels (Brown et al. 1993), compiled by numba.

Model: p(f_1..f_m | e_0..e_l) = prod_j sum_i t(f_j | e_i) / (l + 1), with e_0 = NULL.
Posterior of link (i, j): t(f_j | e_i) / sum_i' t(f_j | e_i').

Every function takes a :class:`~spark_align.kernels.ragged.View` and ``t``, a
float64 array with one probability per dictionary entry (t(gen word | cond
word) for that entry's key). The training E-step, which runs once per link per
iteration, is a numba-compiled loop over the view's cell grid: the numpy
formulation needs about ten int64 temporaries per link and ran at 0.17 of a C
reference (benchmarks/bench_vs_c.py); the compiled loop reads each cell twice
and writes nothing per link but the count. Decoding's posteriors and per-pair
likelihood are one compiled pass too, and so is the per-token argmax the other
models share: the output pass decodes every pair of the corpus.
The compiled code is cached on disk (``cache=True``), so a Spark Python worker
pays the compile only once per machine, not once per task.
"""
from __future__ import annotations

import numpy as np
from numba import njit

from spark_align.kernels.ragged import GenCells, View, grid_steps


def e_step(view: View, t: np.ndarray) -> tuple[np.ndarray, float]:
    """Expected counts per dictionary entry and the log-likelihood of the view.

    count(entry) = sum over links (i, j) using the entry of t(f_j|e_i) / sum_i' t(f_j|e_i').
    Returns ``counts`` float64 (len(t),) and ``loglik`` =
    sum_pairs [sum_j log(sum_i t(f_j|e_i)) - m log(l+1)].
    """
    counts = np.zeros(len(t))
    # The stored grid in either order (``View.grid``): the reverse direction skips its transpose and reads
    # each token's cells contiguously (two blocks at 1M pairs: 38 ms against 47 ms with the transpose).
    # Same sums in the same order.
    loglik = _e_step_compiled(np.asarray(view.cond_len, np.int64), np.asarray(view.gen_len, np.int64),
                              np.asarray(view.cell_offsets, np.int64), np.asarray(view.grid, np.int32),
                              bool(view.gen_major), np.asarray(t, np.float64), counts)
    return counts, float(loglik)


@njit(cache=True, nogil=True)
def _e_step_compiled(cond_len, gen_len, cell_offsets, grid, gen_major, t, counts):  # pragma: no cover
    loglik = 0.0
    for p in range(len(cond_len)):
        n_rows, m = cond_len[p] + 1, gen_len[p]
        cond_step, gen_step = grid_steps(cond_len[p], m, gen_major)
        base = cell_offsets[p]
        for j in range(1, m + 1):
            row = base + j * gen_step
            denom = 0.0
            for i in range(n_rows):
                denom += t[grid[row + i * cond_step]]
            inv = 1.0 / denom
            for i in range(n_rows):
                k = grid[row + i * cond_step]
                counts[k] += t[k] * inv
            loglik += np.log(denom)
        loglik -= m * np.log(float(n_rows))
    return loglik


def posteriors(view: View, t: np.ndarray, gc: GenCells | None = None) -> tuple[GenCells, np.ndarray]:
    """Link posteriors, one per link of ``gc`` (they sum to 1 per generated token)."""
    gc, post, _ = posteriors_and_loglik(view, t, gc)
    return gc, post


def pair_loglik(view: View, t: np.ndarray, gc: GenCells | None = None) -> np.ndarray:
    """log p(gen sentence | cond sentence) of every pair, float64 (n_pairs,)."""
    return posteriors_and_loglik(view, t, gc)[2]


def posteriors_and_loglik(view: View, t: np.ndarray, gc: GenCells | None = None
                          ) -> tuple[GenCells, np.ndarray, np.ndarray]:
    """:func:`posteriors` and :func:`pair_loglik` from one compiled pass (they share each token's
    denominator). 32,768 pairs decoded in one process: 0.27 s for the numpy formulas (a gather per
    link, bincounts) against a few hundredths."""
    gc = gc if gc is not None else view.gen_cells()
    post, per_pair = np.empty(gc.n_links), np.empty(view.n_pairs)
    _posteriors_compiled(np.asarray(view.cond_len, np.int64), np.asarray(view.gen_len, np.int64),
                         np.asarray(view.cell_offsets, np.int64), np.asarray(view.grid, np.int32),
                         bool(view.gen_major), np.asarray(t, np.float64), post, per_pair)
    return gc, post, per_pair


@njit(cache=True, nogil=True)
def _posteriors_compiled(cond_len, gen_len, cell_offsets, grid, gen_major, t, post, per_pair):  # pragma: no cover
    # links in gen_cells order: token-major (pairs in order), then cond positions 0..l; the grid read
    # as _e_step_compiled reads it
    k = 0
    for p in range(len(cond_len)):
        n_rows, m = cond_len[p] + 1, gen_len[p]
        cond_step, gen_step = grid_steps(cond_len[p], m, gen_major)
        base = cell_offsets[p]
        ll = 0.0
        for j in range(1, m + 1):
            row = base + j * gen_step
            denom = 0.0
            for i in range(n_rows):
                v = t[grid[row + i * cond_step]]
                post[k + i] = v
                denom += v
            for i in range(n_rows):
                post[k + i] = post[k + i] / denom
            k += n_rows
            ll += np.log(denom)
        per_pair[p] = ll - m * np.log(n_rows + 0.0)


def argmax_per_token(gc: GenCells, score: np.ndarray) -> np.ndarray:
    """Best cond position (0 = NULL) of each token (``score``: one per link of ``gc``, in its order);
    ties go to the later position."""
    score = np.ascontiguousarray(score, np.float64)
    if len(score) != gc.n_links:
        raise ValueError(f"{len(score)} scores for {gc.n_links} links")
    best = np.zeros(gc.n_tokens, dtype=np.int64)
    _argmax_compiled(gc.cond_len, gc.gen_len, score, best)
    return best


@njit(cache=True, nogil=True)
def _argmax_compiled(cond_len, gen_len, score, best):  # pragma: no cover
    # a token's links are consecutive, cond positions 0..l: >= keeps the later of equal scores
    k = 0
    token = 0
    for p in range(len(gen_len)):
        rows = cond_len[p] + 1
        for _j in range(gen_len[p]):
            top, arg = score[k], 0
            for i in range(1, rows):
                if score[k + i] >= top:
                    top, arg = score[k + i], i
            best[token] = arg
            k += rows
            token += 1


def viterbi(view: View, t: np.ndarray, gc: GenCells | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Most probable cond position per generated token and its posterior.

    Under Model 1 links are independent, so the Viterbi alignment is the
    per-token argmax of the posterior. Returns (best_pos int64, best_post float64),
    each (n_gen_tokens,), position 0 meaning NULL.
    """
    gc, post = posteriors(view, t, gc)
    best = argmax_per_token(gc, post)
    return best, post[gc.token_starts + best]
