"""HMM alignment model kernels (Vogel, Ney & Tillmann 1996; NULL states as in Och & Ney 2003), pure numpy.

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
T = (1 - p0) A. The NULL block is diagonal, so a step costs one (B, l) x (l, l)
product, and backward values of real and NULL states with the same memory are
equal, so backward keeps one (B, l) array. Every step is rescaled to sum 1;
log-likelihood = sum of log scales, so long pairs never underflow.

Batching: pairs are grouped by l (T depends only on l and c) and the group's
gen lengths are padded; padded positions emit 1 for every state, so their
scale is exactly 1 and their backward values exactly 1, and their jump counts
are masked out. The only Python loops are over groups and target positions.

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

from spark_align.kernels.ibm1 import argmax_per_token
from spark_align.kernels.ragged import GenCells, View, offsets_from_lengths

MIN_PROB = 1e-12
CONTEXT_CAP = 50
MAX_BATCH = 1024


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


# ---------------------------------------------------------------- batching by cond length

def _token_layout(view: View, gc: GenCells) -> tuple[np.ndarray, np.ndarray]:
    """First token of each pair and first link of each token: int64 (n_pairs,), (n_tokens,)."""
    token_offsets = offsets_from_lengths(view.gen_len)
    token_pair = np.repeat(np.arange(view.n_pairs, dtype=np.int64), view.gen_len)
    link_start = offsets_from_lengths(view.cond_len[token_pair] + 1)[:-1]
    return token_offsets[:-1], link_start


def _groups(view: View) -> list[tuple[int, np.ndarray]]:
    """(l, pairs) batches: pairs with cond length l and m >= 1, at most ``MAX_BATCH`` per batch.

    Pairs are sorted by m within a length so that a batch pads little, and
    batches are capped so that the (M, B, l) work arrays stay small.
    """
    has_tokens = np.flatnonzero(view.gen_len > 0)
    order = has_tokens[np.lexsort((view.gen_len[has_tokens], view.cond_len[has_tokens]))]
    lens = view.cond_len[order]
    cuts = np.flatnonzero(np.diff(lens)) + 1
    out = []
    for g in np.split(order, cuts):
        if len(g):
            l = int(view.cond_len[g[0]])
            out.extend((l, chunk) for chunk in np.array_split(g, -(-len(g) // MAX_BATCH)))
    return out


def _group_links(pairs: np.ndarray, l: int, m: np.ndarray, pair_tok0: np.ndarray,
                 link_start: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Link indices (B, M, l+1) of a group (clamped where padded) and the valid mask (B, M)."""
    n_max = int(m.max())
    jj = np.arange(n_max)[None, :]
    valid = jj < m[:, None]
    tok = pair_tok0[pairs][:, None] + np.minimum(jj, m[:, None] - 1)
    return link_start[tok][..., None] + np.arange(l + 1), valid


class _Group:
    """Forward-backward quantities of one cond-length group (arrays are (M, B, ...), j-major)."""

    def __init__(self, emit: np.ndarray, valid: np.ndarray, jump: np.ndarray, p_null: float,
                 max_jump: int, *, backward: bool = True) -> None:
        l = emit.shape[2] - 1
        self.l, self.valid, self.p_null = l, valid, p_null
        e = np.where(valid[..., None], emit, 1.0).transpose(1, 0, 2)  # (M, B, l+1)
        self.e_real, self.e_null = e[:, :, 1:], e[:, :, 0]
        self.trans = (1.0 - p_null) * transition_matrix(jump, l, max_jump)
        n_pos, n_b = self.e_null.shape
        self.alpha_real = np.empty((n_pos, n_b, l))
        self.alpha_null = np.empty((n_pos, n_b, l))
        self.scale = np.empty((n_pos, n_b))
        self._forward()
        if backward:
            self._backward()

    def _forward(self) -> None:
        l, p0 = self.l, self.p_null
        ar = self.e_real[0] * ((1.0 - p0) / l)
        an = np.repeat(self.e_null[0][:, None] * (p0 / l), l, axis=1)
        for j in range(self.e_null.shape[0]):
            if j:
                s = self.alpha_real[j - 1] + self.alpha_null[j - 1]
                ar = (s @ self.trans) * self.e_real[j]
                an = s * (p0 * self.e_null[j])[:, None]
            c = ar.sum(axis=1) + an.sum(axis=1)
            self.scale[j] = c
            self.alpha_real[j] = ar / c[:, None]
            self.alpha_null[j] = an / c[:, None]

    def _backward(self) -> None:
        p0 = self.p_null
        n_pos = self.e_null.shape[0]
        self.beta = np.empty_like(self.alpha_real)
        self.beta[n_pos - 1] = 1.0
        for j in range(n_pos - 1, 0, -1):
            b = self.beta[j]
            self.beta[j - 1] = (((self.e_real[j] * b) @ self.trans.T)
                                + (p0 * self.e_null[j])[:, None] * b) / self.scale[j][:, None]

    def loglik(self) -> np.ndarray:
        """log p per pair of the group: float64 (B,)."""
        return np.where(self.valid.T, np.log(self.scale), 0.0).sum(axis=0)

    def state_posteriors(self) -> tuple[np.ndarray, np.ndarray]:
        """(real (M, B, l), NULL summed over memories (M, B)): gamma = alpha * beta."""
        return self.alpha_real * self.beta, (self.alpha_null * self.beta).sum(axis=2)

    def jump_counts(self) -> np.ndarray:
        """Expected transitions memory i' -> real i summed over the group: float64 (l, l).

        xi_j(i', i) = s_{j-1}(i') T(i', i) e_j(i) beta_j(i) / scale_j.
        """
        l = self.l
        if self.e_null.shape[0] < 2:
            return np.zeros((l, l))
        s = (self.alpha_real[:-1] + self.alpha_null[:-1]).reshape(-1, l)
        weight = np.where(self.valid.T[1:], 1.0 / self.scale[1:], 0.0)[..., None]
        g = (self.e_real[1:] * self.beta[1:] * weight).reshape(-1, l)
        return (s.T @ g) * self.trans


def _emissions(view: View, t: np.ndarray, gc: GenCells | None) -> tuple[GenCells, np.ndarray]:
    gc = gc if gc is not None else view.gen_cells()
    return gc, t[view.cells[gc.flat]]


def _jump_stats(x: np.ndarray, l: int, max_jump: int, out: np.ndarray) -> None:
    """Add a group's (l, l) transition counts to the dense stats ``out`` (N per bucket, M per context)."""
    pos = np.arange(l)
    d = np.clip(pos[None, :] - pos[:, None], -max_jump, max_jump) + max_jump
    nb = n_buckets(max_jump)
    out[:nb] += np.bincount(d.ravel(), weights=x.ravel(), minlength=nb)
    a = np.minimum(pos, CONTEXT_CAP)
    r = np.minimum(l - 1 - pos, CONTEXT_CAP)
    np.add.at(out, nb + a * (CONTEXT_CAP + 1) + r, x.sum(axis=1))


def forward_backward(view: View, t: np.ndarray, jump: np.ndarray, p_null: float, max_jump: int,
                     gc: GenCells | None = None, *, want_stats: bool = True
                     ) -> tuple[GenCells, np.ndarray, np.ndarray, np.ndarray]:
    """Link posteriors, jump stats and per-pair log-likelihood of a view.

    Returns ``gc``; ``post`` float64 (n_links,) in ``gc`` order (position 0 =
    all NULL states), summing to 1 per token; ``stats`` float64
    (stats_size(max_jump),); ``loglik`` float64 (n_pairs,).
    """
    gc, probs = _emissions(view, t, gc)
    post = np.zeros(len(gc.flat))
    stats = np.zeros(stats_size(max_jump))
    loglik = np.zeros(view.n_pairs)
    pair_tok0, link_start = _token_layout(view, gc)
    for l, pairs in _groups(view):
        m = view.gen_len[pairs]
        idx, valid = _group_links(pairs, l, m, pair_tok0, link_start)
        if l == 0:
            # No real state: NULL generates every word with probability 1.
            post[idx[valid][:, 0]] = 1.0
            loglik[pairs] = np.where(valid, np.log(probs[idx[..., 0]]), 0.0).sum(axis=1)
            continue
        g = _Group(probs[idx], valid, jump, p_null, max_jump)
        loglik[pairs] = g.loglik()
        real, null = g.state_posteriors()
        gamma = np.concatenate([null[..., None], real], axis=2).transpose(1, 0, 2)
        post[idx[valid]] = gamma[valid]
        if want_stats:
            _jump_stats(g.jump_counts(), l, max_jump, stats)
    return gc, post, stats, loglik


def e_step(view: View, t: np.ndarray, jump: np.ndarray, p_null: float, max_jump: int,
           gc: GenCells | None = None) -> tuple[np.ndarray, np.ndarray, float]:
    """(lexical counts float64 (len(t),), jump stats float64 (stats_size,), log-likelihood).

    count(entry) = sum of state posteriors emitting through it: real i at j -> cells[i, j],
    NULL states at j -> cells[0, j].
    """
    gc, post, stats, loglik = forward_backward(view, t, jump, p_null, max_jump, gc)
    counts = np.bincount(view.cells[gc.flat], weights=post, minlength=len(t))
    return counts, stats, float(loglik.sum())


def pair_loglik(view: View, t: np.ndarray, jump: np.ndarray, p_null: float, max_jump: int,
                gc: GenCells | None = None) -> np.ndarray:
    """log p(gen sentence | cond sentence) per pair (forward pass only): float64 (n_pairs,)."""
    gc, probs = _emissions(view, t, gc)
    loglik = np.zeros(view.n_pairs)
    pair_tok0, link_start = _token_layout(view, gc)
    for l, pairs in _groups(view):
        idx, valid = _group_links(pairs, l, view.gen_len[pairs], pair_tok0, link_start)
        if l == 0:
            loglik[pairs] = np.where(valid, np.log(probs[idx[..., 0]]), 0.0).sum(axis=1)
            continue
        loglik[pairs] = _Group(probs[idx], valid, jump, p_null, max_jump, backward=False).loglik()
    return loglik


def viterbi(view: View, t: np.ndarray, jump: np.ndarray, p_null: float, max_jump: int,
            gc: GenCells | None = None) -> np.ndarray:
    """Most probable state sequence, as a cond position per generated token (0 = NULL): int64 (n_tokens,).

    delta_j(real i) = log e_j(i) + max_i' [max(delta_{j-1}(real i'), delta_{j-1}(NULL i')) + log T(i', i)].
    """
    gc, probs = _emissions(view, t, gc)
    best = np.zeros(gc.n_tokens, dtype=np.int64)
    pair_tok0, link_start = _token_layout(view, gc)
    with np.errstate(divide="ignore"):
        log_probs = np.log(probs)
    for l, pairs in _groups(view):
        if l == 0:
            continue
        m = view.gen_len[pairs]
        idx, valid = _group_links(pairs, l, m, pair_tok0, link_start)
        path = _viterbi_group(log_probs[idx], m, jump, p_null, max_jump)
        tok = pair_tok0[pairs][:, None] + np.arange(idx.shape[1])[None, :]
        best[tok[valid]] = path[valid]
    return best


def _viterbi_group(log_emit: np.ndarray, m: np.ndarray, jump: np.ndarray, p_null: float,
                   max_jump: int) -> np.ndarray:
    """Best path of a group: cond position (0 = NULL) per (pair, j), int64 (B, M)."""
    n_b, n_pos, l1 = log_emit.shape
    l = l1 - 1
    with np.errstate(divide="ignore"):
        log_t = np.log((1.0 - p_null) * transition_matrix(jump, l, max_jump))
        log_p0 = np.log(p_null)
        log_init_real, log_init_null = np.log((1.0 - p_null) / l), np.log(p_null / l)
    e = log_emit.transpose(1, 0, 2)  # (M, B, l+1)
    d_real = np.empty((n_pos, n_b, l))
    d_null = np.empty((n_pos, n_b, l))
    back = np.zeros((n_pos, n_b, l), dtype=np.int64)
    d_real[0] = e[0, :, 1:] + log_init_real
    d_null[0] = e[0, :, :1] + log_init_null
    for j in range(1, n_pos):
        u = np.maximum(d_real[j - 1], d_null[j - 1])
        cand = u[:, :, None] + log_t[None]
        back[j] = cand.argmax(axis=1)
        d_real[j] = np.take_along_axis(cand, back[j][:, None, :], axis=1)[:, 0, :] + e[j, :, 1:]
        d_null[j] = u + log_p0 + e[j, :, :1]
    rows = np.arange(n_b)
    last = m - 1
    final = np.concatenate([d_real[last, rows], d_null[last, rows]], axis=1)
    state = final.argmax(axis=1)
    is_null, mem = state >= l, state % l
    path = np.zeros((n_b, n_pos), dtype=np.int64)
    # Pairs shorter than the group keep their final state until j reaches their last token.
    for j in range(n_pos - 1, -1, -1):
        path[:, j] = np.where(is_null, 0, mem + 1)
        if j == 0:
            break
        active = j <= last
        prev_mem = np.where(is_null, mem, back[j, rows, mem])
        # Ties between a real and a NULL predecessor went to the real one in the max above.
        prev_null = d_null[j - 1, rows, prev_mem] > d_real[j - 1, rows, prev_mem]
        mem = np.where(active, prev_mem, mem)
        is_null = np.where(active, prev_null, is_null)
    return path


def posterior_best(gc: GenCells, post: np.ndarray) -> np.ndarray:
    """Per-token argmax of the link posteriors (position 0 = NULL): int64 (n_tokens,)."""
    return argmax_per_token(gc, post)
