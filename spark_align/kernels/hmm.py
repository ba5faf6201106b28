"""HMM alignment model kernels (Vogel, Ney & Tillmann 1996; NULL states as in Och & Ney 2003).

States of a pair with l cond words: real states 1..l and l NULL states; NULL
state i' means "aligned to NULL, last real position i'". Both kinds of state
with memory i' share their outgoing transitions:

    p(real i | memory i') = (1 - p0) c(d(i - i')) / sum_{i''=1..l} c(d(i'' - i')),
    p(NULL i' | memory i') = p0,

with jump buckets d(x) = clip(x, -K, K) (K = ``max_jump``). Emission of real i
at j is t(f_j | e_i); of any NULL state t(f_j | NULL). Initial distribution
(our choice, no parameters): real i with (1 - p0) / l, NULL state i with p0 / l.
A pair with l = 0 aligns every word to NULL with probability 1.

Forward: s_{j-1} = alpha^real_{j-1} + alpha^null_{j-1} (per memory), then
alpha^real_j = (s_{j-1} @ T) * e_j, alpha^null_j = p0 * s_{j-1} * e_j(NULL),
T = (1 - p0) A. The NULL block is diagonal, so a step costs one (l,) x (l, l)
product, and backward values of real and NULL states with the same memory are
equal, so backward keeps one value per memory. Every step is rescaled to sum 1;
log-likelihood = sum of log scales, so long pairs never underflow.

Forward-backward (training, posteriors, likelihood) and Viterbi are numba-compiled
loops over one pair at a time, visiting pairs by cond length so that T (or log T)
is computed once per length.
The earlier numpy formulation batched pairs of one cond length with padding and
ran at 0.48 of the C reference in benchmarks/bench_vs_c.py; the compiled loop
gathers each pair's emissions once into contiguous rows and runs at 1.7 of it
(20k generated pairs, same run).

M-step for c: the expected complete log-likelihood
sum_d N(d) log c(d) - sum_ctx M(ctx) log Z_ctx(c) (N: expected jumps per bucket,
M: expected jumps out of each memory context) has no closed form because each
context normalises over a different set of buckets. ``jump_m_step`` maximises it
by minorise-maximise iterations c(d) <- N(d) / sum_ctx M(ctx) mult_ctx(d) / Z_ctx,
each of which cannot lower it, so EM's log-likelihood never decreases. A context
is (a, r) = (i' - 1, l - i'), room to the left and right; it is exact up to
``CONTEXT_CAP`` and merged with the capped one beyond.
"""
from __future__ import annotations

import numpy as np
from numba import njit

from spark_align.kernels.ibm1 import argmax_per_token
from spark_align.kernels.ragged import GenCells, View, grid_steps, offsets_from_lengths

MIN_PROB = 1e-12
CONTEXT_CAP = 50


# ---------------------------------------------------------------- jump parameters

def n_buckets(max_jump: int) -> int:
    return 2 * max_jump + 1


def stats_size(max_jump: int) -> int:
    """Dense statistics: N per bucket, then M per (a, r) context."""
    return n_buckets(max_jump) + (CONTEXT_CAP + 1) ** 2


def transition_matrix(jump: np.ndarray, l: int, max_jump: int) -> np.ndarray:
    """A[i'-1, i-1] = c(d(i - i')) / sum_i'' c(d(i'' - i')): float64 (l, l), rows sum to 1."""
    pos = np.arange(l)
    d = np.clip(pos[None, :] - pos[:, None], -max_jump, max_jump) + max_jump
    w = jump[d]
    return w / w.sum(axis=1, keepdims=True)


def _multiplicities(max_jump: int) -> np.ndarray:
    """How many jumps of each bucket every (a, r) context allows: float64 (n_ctx, n_buckets)."""
    a = np.repeat(np.arange(CONTEXT_CAP + 1), CONTEXT_CAP + 1)[:, None]
    r = np.tile(np.arange(CONTEXT_CAP + 1), CONTEXT_CAP + 1)[:, None]
    d = np.arange(-max_jump, max_jump + 1)[None, :]
    mult = ((d >= -a) & (d <= r)).astype(np.float64)
    mult[:, 0] = np.maximum(0, a[:, 0] - max_jump + 1)
    mult[:, -1] = np.maximum(0, r[:, 0] - max_jump + 1)
    return mult


def jump_m_step(stats: np.ndarray, jump: np.ndarray, max_jump: int, *,
                n_iter: int = 200, tol: float = 1e-13) -> np.ndarray:
    """New jump weights c from summed stats (see the module docstring); float64 (n_buckets,), sums to 1.

    c(d) <- N(d) / sum_ctx M(ctx) mult_ctx(d) / Z_ctx(c); buckets never reachable keep their weight.
    """
    nb = n_buckets(max_jump)
    n_jump, ctx_mass = stats[:nb], stats[nb:]
    if n_jump.sum() <= 0:
        return jump.copy()
    mult = _multiplicities(max_jump)
    keep = ctx_mass > 0
    mult, ctx_mass = mult[keep], ctx_mass[keep]
    c = np.maximum(jump / jump.sum(), MIN_PROB)
    for _ in range(n_iter):
        z = mult @ c
        denom = mult.T @ (ctx_mass / z)
        new = np.where(denom > 0, n_jump / np.where(denom > 0, denom, 1.0), c)
        new = np.maximum(new / new.sum(), MIN_PROB)
        done = np.max(np.abs(new - c)) < tol
        c = new
        if done:
            break
    return c


# ---------------------------------------------------------------- forward-backward and Viterbi, compiled

def forward_backward(view: View, t: np.ndarray, jump: np.ndarray, p_null: float, max_jump: int,
                     gc: GenCells | None = None, *, want_stats: bool = True
                     ) -> tuple[GenCells, np.ndarray, np.ndarray, np.ndarray]:
    """Link posteriors, jump stats and per-pair log-likelihood of a view.

    Returns ``gc``; ``post`` float64 (n_links,) in ``gc`` order (position 0 =
    all NULL states), summing to 1 per token; ``stats`` float64
    (stats_size(max_jump),); ``loglik`` float64 (n_pairs,).
    """
    gc = gc if gc is not None else view.gen_cells()
    post = np.empty(gc.n_links)
    stats = np.zeros(stats_size(max_jump))
    loglik = _run(view, t, jump, p_null, max_jump, backward=True, counts=np.zeros(0),
                  stats=stats if want_stats else np.zeros(0), post=post)
    return gc, post, stats, loglik


def e_step(view: View, t: np.ndarray, jump: np.ndarray, p_null: float, max_jump: int,
           gc: GenCells | None = None) -> tuple[np.ndarray, np.ndarray, float]:
    """(lexical counts float64 (len(t),), jump stats float64 (stats_size,), log-likelihood).

    count(entry) = sum of state posteriors emitting through it: real i at j -> cells[i, j],
    NULL states at j -> cells[0, j]. ``gc`` is not needed (accepted for the callers that have it).
    """
    counts, stats = np.zeros(len(t)), np.zeros(stats_size(max_jump))
    loglik = _run(view, t, jump, p_null, max_jump, backward=True, counts=counts, stats=stats, post=np.zeros(0))
    return counts, stats, float(loglik.sum())


def pair_loglik(view: View, t: np.ndarray, jump: np.ndarray, p_null: float, max_jump: int,
                gc: GenCells | None = None) -> np.ndarray:
    """log p(gen sentence | cond sentence) per pair (forward pass only): float64 (n_pairs,)."""
    return _run(view, t, jump, p_null, max_jump, backward=False, counts=np.zeros(0), stats=np.zeros(0),
                post=np.zeros(0))


def _run(view: View, t, jump, p_null, max_jump, *, backward, counts, stats, post) -> np.ndarray:
    """The compiled pass over every pair; fills what is asked for (empty arrays: not wanted) and
    returns the log-likelihood per pair."""
    loglik = np.zeros(view.n_pairs)
    cond_len, gen_len = np.asarray(view.cond_len, np.int64), np.asarray(view.gen_len, np.int64)
    _forward_backward_compiled(
        cond_len, gen_len, np.asarray(view.cell_offsets, np.int64), np.asarray(view.grid, np.int32),
        bool(view.gen_major), *_by_cond_length(cond_len, gen_len * (cond_len + 1)), np.asarray(t, np.float64),
        np.asarray(jump, np.float64), float(p_null), int(max_jump), CONTEXT_CAP, bool(backward),
        counts, stats, post, loglik)
    return loglik


def _by_cond_length(cond_len: np.ndarray, out_len: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(pairs in order of cond length, each pair's first output position for outputs of ``out_len``
    per pair in pair order). The kernels visit pairs by length so that they compute the transition
    matrix once per length rather than on nearly every pair: Viterbi decoding (l^2 logarithms per
    matrix) of 3,000 random pairs took 10.3 ms against 18.4, the E-step 15.2 against 16.3."""
    return np.argsort(cond_len, kind="stable"), offsets_from_lengths(out_len)[:-1]


@njit(cache=True, nogil=True)
def _forward_backward_compiled(cond_len, gen_len, cell_offsets, grid, gen_major, order, link_first, t, jump, p0,
                               max_jump, cap, backward, counts, stats, post, loglik):  # pragma: no cover
    # One pair at a time, as the module docstring describes, in ``order`` (by cond length, so T is
    # computed once per length); every array is a pair-sized scratch buffer reused across pairs. The
    # emissions are gathered once per pair into (m, l) (real) and (m,) (NULL), so the passes below
    # read them contiguously. ``link_first``: each pair's first link in ``post``. The grid is read
    # as stored, in either order (``View.grid``, ``ragged.grid_steps``).
    want_counts, want_stats, want_post = len(counts) > 0, len(stats) > 0, len(post) > 0
    max_l, max_cells, max_m = 1, 1, 1
    for p in range(len(cond_len)):
        max_l = max(max_l, cond_len[p])
        max_m = max(max_m, gen_len[p])
        max_cells = max(max_cells, cond_len[p] * gen_len[p])
    trans, trans_t = np.empty((max_l, max_l)), np.empty((max_l, max_l))
    e_real, ar, an, beta = (np.empty(max_cells), np.empty(max_cells), np.empty(max_cells),
                            np.empty(max_cells))
    e_null, scale = np.empty(max_m), np.empty(max_m)
    s, g = np.empty(max_l), np.empty(max_l)
    x = np.empty((max_l, max_l))
    nb = 2 * max_jump + 1
    trans_l = -1
    for at in range(len(order)):
        p = order[at]
        link0 = link_first[p]
        l, m = cond_len[p], gen_len[p]
        base = cell_offsets[p]
        cond_step, gen_step = grid_steps(l, m, gen_major)
        if m == 0:
            continue
        if l == 0:  # no real state: NULL generates every word with probability 1
            ll = 0.0
            for j in range(m):
                k = grid[base + (j + 1) * gen_step]
                ll += np.log(t[k])
                if want_counts:
                    counts[k] += 1.0
                if want_post:
                    post[link0 + j] = 1.0
            loglik[p] = ll
            continue
        if l != trans_l:  # T = (1 - p0) A, recomputed when the cond length changes
            for a in range(l):
                z = 0.0
                for b in range(l):
                    trans[a, b] = jump[min(max(b - a, -max_jump), max_jump) + max_jump]
                    z += trans[a, b]
                for b in range(l):
                    trans[a, b] = (1.0 - p0) * (trans[a, b] / z)
                    trans_t[b, a] = trans[a, b]
            trans_l = l
        for j in range(m):
            col = base + (j + 1) * gen_step
            e_null[j] = t[grid[col]]
            for i in range(l):
                e_real[j * l + i] = t[grid[col + (i + 1) * cond_step]]
        # forward, every step rescaled to sum 1
        ll = 0.0
        for j in range(m):
            o = j * l
            if j == 0:
                for i in range(l):
                    ar[i] = e_real[i] * ((1.0 - p0) / l)
                    an[i] = e_null[0] * (p0 / l)
            else:
                q = o - l
                for i in range(l):
                    s[i] = ar[q + i] + an[q + i]
                    ar[o + i] = 0.0
                for a in range(l):
                    sa = s[a]
                    for i in range(l):
                        ar[o + i] += sa * trans[a, i]
                pe = p0 * e_null[j]
                for i in range(l):
                    ar[o + i] *= e_real[o + i]
                    an[o + i] = s[i] * pe
            c = 0.0
            for i in range(l):
                c += ar[o + i]
            for i in range(l):
                c += an[o + i]
            scale[j] = c
            inv = 1.0 / c
            for i in range(l):
                ar[o + i] *= inv
                an[o + i] *= inv
            ll += np.log(c)
        loglik[p] = ll
        if not backward:
            continue
        # backward: real and NULL states with the same memory share their backward value
        o = (m - 1) * l
        for i in range(l):
            beta[o + i] = 1.0
        for j in range(m - 1, 0, -1):
            o = j * l
            inv = 1.0 / scale[j]
            pe = p0 * e_null[j]
            # beta_{j-1}(a) = sum_i T(a, i) e_j(i) beta_j(i): summed over i in the outer loop (the same
            # additions in the same order) so that the inner loop over a vectorises
            for a in range(l):
                s[a] = 0.0
            for i in range(l):
                gi = e_real[o + i] * beta[o + i]
                for a in range(l):
                    s[a] += trans_t[i, a] * gi
            for a in range(l):
                beta[o - l + a] = (s[a] + pe * beta[o + a]) * inv
        # state posteriors: lexical counts and link posteriors
        for j in range(m):
            o = j * l
            col = base + (j + 1) * gen_step
            null_post = 0.0
            for i in range(l):
                gamma = ar[o + i] * beta[o + i]
                null_post += an[o + i] * beta[o + i]
                if want_counts:
                    counts[grid[col + (i + 1) * cond_step]] += gamma
                if want_post:
                    post[link0 + j * (l + 1) + i + 1] = gamma
            if want_counts:
                counts[grid[col]] += null_post
            if want_post:
                post[link0 + j * (l + 1)] = null_post
        if not want_stats:
            continue
        # expected jumps xi_j(i', i) = s_{j-1}(i') T(i', i) e_j(i) beta_j(i) / scale_j, summed over j
        for a in range(l):
            for i in range(l):
                x[a, i] = 0.0
        for j in range(1, m):
            o, q = j * l, (j - 1) * l
            inv = 1.0 / scale[j]
            for i in range(l):
                s[i] = ar[q + i] + an[q + i]
                g[i] = e_real[o + i] * beta[o + i] * inv
            for a in range(l):
                sa = s[a]
                for i in range(l):
                    x[a, i] += sa * trans[a, i] * g[i]
        for a in range(l):
            row = 0.0
            for b in range(l):
                stats[min(max(b - a, -max_jump), max_jump) + max_jump] += x[a, b]
                row += x[a, b]
            stats[nb + min(a, cap) * (cap + 1) + min(l - 1 - a, cap)] += row


def viterbi(view: View, t: np.ndarray, jump: np.ndarray, p_null: float, max_jump: int,
            gc: GenCells | None = None) -> np.ndarray:
    """Most probable state sequence, as a cond position per generated token (0 = NULL): int64 (n_tokens,).

    delta_j(real i) = log e_j(i) + max_i' [max(delta_{j-1}(real i'), delta_{j-1}(NULL i')) + log T(i', i)].
    Ties go to the lowest memory i', and between a real and a NULL state with the same memory to the
    real one. ``gc`` is not needed (accepted for the callers that have it).
    """
    with np.errstate(divide="ignore"):
        log_p0 = np.log(p_null)
        log_keep = np.log(1.0 - p_null)
    cond_len, gen_len = np.asarray(view.cond_len, np.int64), np.asarray(view.gen_len, np.int64)
    best = np.zeros(int(gen_len.sum()), dtype=np.int64)
    _viterbi_compiled(cond_len, gen_len, np.asarray(view.cell_offsets, np.int64), np.asarray(view.grid, np.int32),
                      bool(view.gen_major), *_by_cond_length(cond_len, gen_len), np.asarray(t, np.float64),
                      np.asarray(jump, np.float64),
                      float(log_p0), float(log_keep), int(max_jump), best)
    return best


@njit(cache=True, nogil=True)
def _viterbi_compiled(cond_len, gen_len, cell_offsets, grid, gen_major, order, tok_first, t, jump, log_p0,
                      log_keep, max_jump, best):  # pragma: no cover - compiled
    # pairs in ``order`` (by cond length: log T computed once per length); ``tok_first``: each pair's
    # first token in ``best``; the grid read as _forward_backward_compiled reads it
    max_l, max_cells = 1, 1
    for p in range(len(cond_len)):
        max_l = max(max_l, cond_len[p])
        max_cells = max(max_cells, cond_len[p] * gen_len[p])
    log_t = np.empty((max_l, max_l))
    d_real, d_null = np.empty(max_cells), np.empty(max_cells)
    back = np.empty(max_cells, np.int64)
    u, best_v = np.empty(max_l), np.empty(max_l)
    best_a = np.empty(max_l, np.int64)
    trans_l = -1
    for at in range(len(order)):
        p = order[at]
        tok0 = tok_first[p]
        l, m = cond_len[p], gen_len[p]
        base = cell_offsets[p]
        cond_step, gen_step = grid_steps(l, m, gen_major)
        if l == 0 or m == 0:  # no real state: every token stays NULL (0)
            continue
        if l != trans_l:
            for a in range(l):
                z = 0.0
                for b in range(l):
                    z += jump[min(max(b - a, -max_jump), max_jump) + max_jump]
                for b in range(l):
                    log_t[a, b] = np.log(jump[min(max(b - a, -max_jump), max_jump) + max_jump] / z) + log_keep
            trans_l = l
        init_real, init_null = log_keep - np.log(l), log_p0 - np.log(l)
        col = base + gen_step
        for i in range(l):
            d_real[i] = np.log(t[grid[col + (i + 1) * cond_step]]) + init_real
            d_null[i] = np.log(t[grid[col]]) + init_null
        for j in range(1, m):
            o, q = j * l, (j - 1) * l
            for a in range(l):
                u[a] = max(d_real[q + a], d_null[q + a])
            col = base + (j + 1) * gen_step
            e_null = np.log(t[grid[col]])
            # best memory of each real state: the first a with the largest u(a) + log T(a, i), found with
            # a in the outer loop (the same comparisons in the same order) so that the inner loop over
            # i vectorises
            for i in range(l):
                best_v[i] = u[0] + log_t[0, i]
                best_a[i] = 0
            for a in range(1, l):
                ua = u[a]
                for i in range(l):
                    v = ua + log_t[a, i]
                    if v > best_v[i]:
                        best_v[i] = v
                        best_a[i] = a
            for i in range(l):
                back[o + i] = best_a[i]
                d_real[o + i] = best_v[i] + np.log(t[grid[col + (i + 1) * cond_step]])
                d_null[o + i] = u[i] + log_p0 + e_null
        # the best final state: real states first, so a tie goes to the real one
        o = (m - 1) * l
        mem, is_null, top = 0, False, d_real[o]
        for i in range(1, l):
            if d_real[o + i] > top:
                mem, top = i, d_real[o + i]
        for i in range(l):
            if d_null[o + i] > top:
                mem, is_null, top = i, True, d_null[o + i]
        for j in range(m - 1, -1, -1):
            best[tok0 + j] = 0 if is_null else mem + 1
            if j == 0:
                break
            if not is_null:
                mem = back[j * l + mem]
            q = (j - 1) * l
            is_null = d_null[q + mem] > d_real[q + mem]


def posterior_best(gc: GenCells, post: np.ndarray) -> np.ndarray:
    """Per-token argmax of the link posteriors (position 0 = NULL): int64 (n_tokens,)."""
    return argmax_per_token(gc, post)
