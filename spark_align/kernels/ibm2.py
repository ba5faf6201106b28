"""IBM Model 2 kernels, classic and diagonal-favouring.

Both models keep the links of a generated word independent, so every kernel is
IBM Model 1's with the lexical score ``t`` multiplied by an alignment probability:

    p(f_1..f_m | e_0..e_l) = prod_j sum_{i=0..l} a(i | j, l, m) t(f_j | e_i),  e_0 = NULL.

Classic table, bounded (``cap`` = the ``max_length_cap`` option)
    For l <= cap and m <= cap, a(i | j, l, m) is one free table entry, exactly
    as in the classic model. A longer side is read at the capped length on a
    relative scale: positions 1..L of a side with L > cap fall into ``cap``
    bins, position p into bin ``(p - 1) * cap // L + 1``, and

        a(i | j, l, m) = q(bin(i) | bin(j), min(l, cap), min(m, cap)) / size(bin(i)),

    with NULL (i = 0) always its own bin of size 1. Dividing by the bin size
    keeps every a(. | j, l, m) a distribution over 0..l, so the M-step stays the
    closed-form normalisation of expected counts per (bin(j), l', m') row.
    The table therefore has sum_{l'=0..cap} (l'+1) * sum_{m'=1..cap} m' entries
    (48,510 for cap 20), whatever the corpus.

Diagonal-favouring reparameterisation (Dyer, Chahuneau & Smith 2013)
    a(0 | j, l, m) = p0;  a(i | j, l, m) = (1 - p0) exp(lam h(i,j,l,m)) / Z_lam(j,l,m),
    h(i, j, l, m) = -|i/l - j/m|, Z summing the numerator over i = 1..l. The only
    learned parameter is the scalar ``lam``; its M-step maximises
    lam * E[h] - sum_tokens P(not NULL) log Z_lam, whose derivative needs the
    posterior non-NULL mass per (j, l, m) context. Those masses are binned
    like the classic table's rows (exact while l, m <= cap; longer pairs are
    represented by their capped, relatively-placed context).

A sentence with l = 0 aligns every word to NULL with probability 1.

The training E-steps are numba-compiled loops over one pair at a time, as
Model 1's: 134 and 118 M links/s (classic, diagonal) against 12.8 and 11.7 for
the numpy link formulas they replaced (benchmarks/bench_kernels.py, same run).
Decoding (posteriors and per-pair log-likelihood) is one compiled pass of the same
kind. Both step through the grid as stored, so the reverse direction is never
transposed. Tests hold them to the numpy link formulas (``tests/kernels/ibm2_links.py``)
and to brute-force enumeration.
"""
from __future__ import annotations

import numpy as np
from numba import njit

from spark_align.kernels.ibm1 import argmax_per_token
from spark_align.kernels.ragged import GenCells, View, grid_steps, offsets_from_lengths

MIN_PROB = 1e-12
LAMBDA_MAX = 100.0


# ---------------------------------------------------------------- classic table layout

def table_offsets(cap: int) -> tuple[np.ndarray, int]:
    """Start of every (l', m') block of the table and the table size.

    Returns ``offsets`` int64 (cap+1, cap+1), indexed [l', m'], and ``size``. Block
    (l', m') holds m' rows (j' = 1..m') of l'+1 entries (i' = 0..l'), so each
    normalisation row is contiguous; m' = 0 blocks are empty.
    """
    lc = np.arange(cap + 1, dtype=np.int64)[:, None]
    mc = np.arange(cap + 1, dtype=np.int64)[None, :]
    sizes = ((lc + 1) * mc).ravel()
    offsets = offsets_from_lengths(sizes)
    return offsets[:-1].reshape(cap + 1, cap + 1), int(offsets[-1])


def table_size(cap: int) -> int:
    """Number of entries of the alignment table for ``cap``."""
    return table_offsets(cap)[1]


def table_rows(cap: int) -> np.ndarray:
    """Length l'+1 of every normalisation row, in table order: int64 (n_rows,)."""
    lc = np.repeat(np.arange(cap + 1, dtype=np.int64), cap + 1)
    mc = np.tile(np.arange(cap + 1, dtype=np.int64), cap + 1)
    return np.repeat(lc + 1, mc)


def uniform_table(cap: int) -> np.ndarray:
    """a = 1/(l'+1) everywhere: float64 (table_size(cap),)."""
    rows = table_rows(cap)
    return np.repeat(1.0 / rows, rows)


def normalize_table(counts: np.ndarray, previous: np.ndarray, cap: int) -> np.ndarray:
    """M-step: a = max(count / row total, 1e-12); rows never seen keep ``previous``.

    ``counts``, ``previous``: float64 (table_size(cap),). Returns the same shape.
    """
    rows = table_rows(cap)
    starts = offsets_from_lengths(rows)[:-1]
    totals = np.add.reduceat(counts, starts) if len(counts) else np.zeros(0)
    total_per_entry = np.repeat(totals, rows)
    seen = total_per_entry > 0
    est = np.divide(counts, total_per_entry, out=np.zeros_like(counts), where=seen)
    return np.where(seen, np.maximum(est, MIN_PROB), previous)


# ---------------------------------------------------------------- classic Model 2

def e_step(view: View, t: np.ndarray, table: np.ndarray, cap: int,
           gc: GenCells | None = None) -> tuple[np.ndarray, np.ndarray, float]:
    """Expected lexical counts, expected table counts and log-likelihood.

    post(i, j) = a(i|j,l,m) t(f_j|e_i) / sum_i' a(i'|j,l,m) t(f_j|e_i').
    Returns ``counts`` float64 (len(t),), ``table_counts`` float64 (len(table),)
    and ``loglik`` = sum_tokens log sum_i a t. Compiled, one pair at a time (``gc`` is
    not needed; accepted for the callers that have it).
    """
    counts, table_counts = np.zeros(len(t)), np.zeros(len(table))
    offsets, _ = table_offsets(cap)
    loglik = _e_step_compiled(*_view_arrays(view), np.asarray(t, np.float64), np.asarray(table, np.float64),
                              offsets, int(cap), counts, table_counts)
    return counts, table_counts, float(loglik)


def _view_arrays(view: View):
    # the grid as stored, in either order (``View.grid``): the E-steps step through it, so the reverse
    # direction needs no transpose
    return (np.asarray(view.cond_len, np.int64), np.asarray(view.gen_len, np.int64),
            np.asarray(view.cell_offsets, np.int64), np.asarray(view.grid, np.int32), bool(view.gen_major))


@njit(cache=True, nogil=True, inline="always")
def _bin(pos, length, cap):  # pragma: no cover - compiled; position_bin for one position
    return (pos - 1) * cap // length + 1 if length > cap else pos


@njit(cache=True, nogil=True, inline="always")
def _longest(cond_len):  # pragma: no cover - compiled; at least 1, for scratch arrays of max_l + 1
    max_l = 1
    for p in range(len(cond_len)):
        max_l = max(max_l, cond_len[p])
    return max_l


@njit(cache=True, nogil=True, inline="always")
def _bin_sizes(l, cap, size):  # pragma: no cover - compiled; size[i] = bin_size of position i = 1..l
    for i in range(1, l + 1):
        if l > cap:
            b = _bin(i, l, cap)
            size[i] = -(-(b * l) // cap) + (-((b - 1) * l)) // cap  # two ceilings
        else:
            size[i] = 1


@njit(cache=True, nogil=True)
def _e_step_compiled(cond_len, gen_len, cell_offsets, grid, gen_major, t, table, offsets, cap, counts,
                     table_counts):  # pragma: no cover - compiled
    # Model 1's loop with t(f_j|e_i) times a(i|j,l,m) = table[entry] / bin size; the same operations in
    # the same order as the numpy link formulas (tests/kernels/ibm2_links.py: posteriors, then bincounts
    # in link order). The grid is read as stored, in either order (``View.grid``, ``ragged.grid_steps``).
    max_l = _longest(cond_len)
    score = np.empty(max_l + 1)
    entry = np.empty(max_l + 1, np.int64)
    size = np.ones(max_l + 1, np.int64)
    loglik = 0.0
    for p in range(len(cond_len)):
        l, m = cond_len[p], gen_len[p]
        base = cell_offsets[p]
        cond_step, gen_step = grid_steps(l, m, gen_major)
        lc, mc = min(l, cap), min(m, cap)
        _bin_sizes(l, cap, size)
        for j in range(1, m + 1):
            row = offsets[lc, mc] + (_bin(j, m, cap) - 1) * (lc + 1)
            col = base + j * gen_step
            denom = 0.0
            for i in range(l + 1):
                e = row + (_bin(i, l, cap) if i > 0 else 0)
                entry[i] = e
                score[i] = t[grid[col + i * cond_step]] * (table[e] / size[i])
                denom += score[i]
            for i in range(l + 1):
                post = score[i] / denom
                counts[grid[col + i * cond_step]] += post
                table_counts[entry[i]] += post
            loglik += np.log(denom)
    return loglik


def posteriors(view: View, t: np.ndarray, table: np.ndarray, cap: int,
               gc: GenCells | None = None) -> tuple[GenCells, np.ndarray]:
    """Link posteriors, float64 (n_links,) in ``gc``'s order, summing to 1 per generated token."""
    gc, post, _ = _decode(view, t, gc, table=table, cap=cap)
    return gc, post


def pair_loglik(view: View, t: np.ndarray, table: np.ndarray, cap: int,
                gc: GenCells | None = None) -> np.ndarray:
    """log p(gen sentence | cond sentence) per pair, float64 (n_pairs,)."""
    return _decode(view, t, gc, table=table, cap=cap)[2]


# ---------------------------------------------------------------- diagonal Model 2

def diag_n_contexts(cap: int) -> int:
    return cap * (cap * (cap + 1) // 2)


def diag_e_step(view: View, t: np.ndarray, p_null: float, lam: float, cap: int,
                gc: GenCells | None = None) -> tuple[np.ndarray, float, np.ndarray, float]:
    """Expected lexical counts, expected feature, non-NULL mass per context, log-likelihood.

    Returns ``counts`` float64 (len(t),); ``feature`` = sum_links post * h;
    ``mass`` float64 (diag_n_contexts(cap),), the posterior non-NULL mass of each
    token summed per context; ``loglik``. Compiled, one pair at a time (``gc`` is not
    needed; accepted for the callers that have it).
    """
    counts, mass = np.zeros(len(t)), np.zeros(diag_n_contexts(cap))
    out = np.zeros(2)
    _diag_e_step_compiled(*_view_arrays(view), np.asarray(t, np.float64), float(p_null), float(lam), int(cap),
                          counts, mass, out)
    return counts, float(out[0]), mass, float(out[1])


@njit(cache=True, nogil=True)
def _diag_e_step_compiled(cond_len, gen_len, cell_offsets, grid, gen_major, t, p_null, lam, cap, counts, mass,
                          out):  # pragma: no cover - compiled
    # a(i|j,l,m) as in the module docstring, per token: p0 for NULL, (1 - p0) exp(lam h) / Z for real i;
    # the grid read as _e_step_compiled reads it.
    max_l = _longest(cond_len)
    score = np.empty(max_l + 1)
    h = np.zeros(max_l + 1)
    w = np.empty(max_l + 1)
    per_l = cap * (cap + 1) // 2
    feature = 0.0
    loglik = 0.0
    for p in range(len(cond_len)):
        l, m = cond_len[p], gen_len[p]
        base = cell_offsets[p]
        cond_step, gen_step = grid_steps(l, m, gen_major)
        lc, mc = min(l, cap), min(m, cap)
        for j in range(1, m + 1):
            col = base + j * gen_step
            z = 0.0
            for i in range(1, l + 1):
                h[i] = -abs(i / l - j / m)
                w[i] = np.exp(lam * h[i])
                z += w[i]
            denom = 0.0
            score[0] = t[grid[col]] * (1.0 if l == 0 else p_null)
            denom += score[0]
            for i in range(1, l + 1):
                score[i] = t[grid[col + i * cond_step]] * ((1.0 - p_null) * w[i] / z)
                denom += score[i]
            real = 0.0
            for i in range(l + 1):
                post = score[i] / denom
                counts[grid[col + i * cond_step]] += post
                if i > 0:
                    feature += post * h[i]
                    real += post
            if l > 0:
                mass[(lc - 1) * per_l + (mc - 1) * mc // 2 + _bin(j, m, cap) - 1] += real
            loglik += np.log(denom)
    out[0] = feature
    out[1] = loglik


def diag_posteriors(view: View, t: np.ndarray, p_null: float, lam: float,
                    gc: GenCells | None = None) -> tuple[GenCells, np.ndarray]:
    """Link posteriors, float64 (n_links,) in ``gc``'s order, summing to 1 per generated token."""
    gc, post, _ = _decode(view, t, gc, p_null=p_null, lam=lam)
    return gc, post


def diag_pair_loglik(view: View, t: np.ndarray, p_null: float, lam: float,
                     gc: GenCells | None = None) -> np.ndarray:
    """log p(gen sentence | cond sentence) per pair, float64 (n_pairs,)."""
    return _decode(view, t, gc, p_null=p_null, lam=lam)[2]


# ---------------------------------------------------------------- decoding (both)

def viterbi_from_posteriors(gc: GenCells, post: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Per-token argmax (links are independent): (best_pos int64, its posterior float64), (n_tokens,)."""
    best = argmax_per_token(gc, post)
    return best, post[gc.token_starts + best]


def _decode(view: View, t: np.ndarray, gc: GenCells | None, *, table: np.ndarray | None = None, cap: int = 1,
            p_null: float = 0.0, lam: float = 0.0) -> tuple[GenCells, np.ndarray, np.ndarray]:
    """(gc, link posteriors, log-likelihood per pair) of the classic model (``table`` given) or the
    diagonal one, in one compiled pass over the grid as stored: no transpose, no per-link index arrays."""
    gc = gc if gc is not None else view.gen_cells()
    post, per_pair = np.empty(gc.n_links), np.empty(view.n_pairs)
    diag = table is None
    offsets = np.zeros((1, 1), np.int64) if diag else table_offsets(cap)[0]
    _decode_compiled(*_view_arrays(view), np.asarray(t, np.float64), diag,
                     np.zeros(1) if diag else np.asarray(table, np.float64), offsets, int(cap), float(p_null),
                     float(lam), post, per_pair)
    return gc, post, per_pair


@njit(cache=True, nogil=True)
def _decode_compiled(cond_len, gen_len, cell_offsets, grid, gen_major, t, diag, table, offsets, cap, p_null, lam,
                     post, per_pair):  # pragma: no cover - compiled
    # Links in gen_cells order (token-major, cond positions 0..l); each link's score as the E-step forms
    # it (classic: t * (table[entry] / bin size); diagonal: t * p0 for NULL, t * ((1 - p0) w / Z) for
    # real i), post = score / (the token's scores summed in order), per pair the sum of log denominators.
    max_l = _longest(cond_len)
    score = np.empty(max_l + 1)
    w = np.empty(max_l + 1)
    size = np.ones(max_l + 1, np.int64)
    k = 0
    for p in range(len(cond_len)):
        l, m = cond_len[p], gen_len[p]
        base = cell_offsets[p]
        cond_step, gen_step = grid_steps(l, m, gen_major)
        lc, mc = min(l, cap), min(m, cap)
        if not diag:
            _bin_sizes(l, cap, size)
        ll = 0.0
        for j in range(1, m + 1):
            col = base + j * gen_step
            denom = 0.0
            if diag:
                z = 0.0
                for i in range(1, l + 1):
                    w[i] = np.exp(lam * -abs(i / l - j / m))
                    z += w[i]
                score[0] = t[grid[col]] * (1.0 if l == 0 else p_null)
                denom += score[0]
                for i in range(1, l + 1):
                    score[i] = t[grid[col + i * cond_step]] * ((1.0 - p_null) * w[i] / z)
                    denom += score[i]
            else:
                row = offsets[lc, mc] + (_bin(j, m, cap) - 1) * (lc + 1)
                for i in range(l + 1):
                    e = row + (_bin(i, l, cap) if i > 0 else 0)
                    score[i] = t[grid[col + i * cond_step]] * (table[e] / size[i])
                    denom += score[i]
            for i in range(l + 1):
                post[k + i] = score[i] / denom
            k += l + 1
            ll += np.log(denom)
        per_pair[p] = ll


def _context_features(cap: int) -> tuple[np.ndarray, np.ndarray]:
    """h of positions i' = 1..cap for every context, and which i' exist: float64/bool (n_ctx, cap)."""
    lc, mc, jb = [], [], []
    for l_ in range(1, cap + 1):
        for m_ in range(1, cap + 1):
            lc.append(np.full(m_, l_))
            mc.append(np.full(m_, m_))
            jb.append(np.arange(1, m_ + 1))
    lc, mc, jb = (np.concatenate(x)[:, None] for x in (lc, mc, jb))
    i = np.arange(1, cap + 1)[None, :]
    return -np.abs(i / lc - jb / mc), i <= lc


def diag_lambda_m_step(feature: float, mass: np.ndarray, lam: float, cap: int, *,
                       n_iter: int = 60, tol: float = 1e-10) -> float:
    """lam maximising Q(lam) = lam * feature - sum_ctx mass_ctx log Z_lam(ctx) on [0, LAMBDA_MAX].

    Q is concave (log Z is convex in lam), so Q' = feature - sum mass E_lam[h]
    decreases and the root is found by Newton steps kept inside a shrinking
    bracket. ``lam`` (the current value) is only the starting point.
    """
    keep = mass > 0
    if not keep.any():
        return lam
    h_all, valid_all = _context_features(cap)
    h, valid, w = h_all[keep], valid_all[keep], mass[keep]

    def grad_curv(x: float) -> tuple[float, float]:
        # Shift by the row max so exp never underflows to an all-zero row.
        s = np.where(valid, x * h, -np.inf)
        e = np.exp(s - s.max(axis=1, keepdims=True))
        p = e / e.sum(axis=1, keepdims=True)
        mean = (p * np.where(valid, h, 0.0)).sum(axis=1)
        var = (p * np.where(valid, h, 0.0) ** 2).sum(axis=1) - mean ** 2
        return feature - float(w @ mean), float(w @ np.maximum(var, 0.0))

    lo, hi = 0.0, LAMBDA_MAX
    g_lo, _ = grad_curv(lo)
    if g_lo <= 0:
        return lo
    g_hi, _ = grad_curv(hi)
    if g_hi >= 0:
        return hi
    x = min(max(lam, lo), hi)
    for _ in range(n_iter):
        g, c = grad_curv(x)
        if g > 0:
            lo = x
        else:
            hi = x
        step = g / c if c > 0 else np.inf
        nxt = x + step
        if not (lo < nxt < hi):
            nxt = 0.5 * (lo + hi)
        if abs(nxt - x) < tol:
            return nxt
        x = nxt
    return x
