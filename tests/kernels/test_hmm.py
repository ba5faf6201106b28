"""HMM kernels against brute-force enumeration of every state sequence, and EM's guarantees."""
from __future__ import annotations

import itertools
import math

import numpy as np
import pytest

from spark_align.kernels import hmm
from spark_align.models.hmm import HMM
from tests.kernels.local_em import make_block, random_corpus, run_em


def brute_force_pair(emit, jump, p_null, max_jump):
    """Enumerate all (2l)^m state sequences of one pair.

    ``emit`` (m, l+1): column 0 is t(f_j | NULL). States 0..l-1 are real, l..2l-1 NULL
    with that memory. Returns (likelihood, link posteriors (m, l+1), best state-sequence
    probability per position path (0 = NULL), jump counts per bucket, jump counts per
    (a, r) context).
    """
    m, l = emit.shape[0], emit.shape[1] - 1
    trans = hmm.transition_matrix(jump, l, max_jump)
    nb = hmm.n_buckets(max_jump)
    total, post = 0.0, np.zeros((m, l + 1))
    n_jump, n_ctx = np.zeros(nb), {}
    best_of_path = {}
    for seq in itertools.product(range(2 * l), repeat=m):
        p, mem, moves = 1.0, None, []
        for j, state in enumerate(seq):
            real, pos = state < l, state % l
            if j == 0:
                p *= (1 - p_null) / l if real else p_null / l
            elif real:
                p *= (1 - p_null) * trans[mem, pos]
                moves.append((mem, pos))
            else:
                p *= p_null if pos == mem else 0.0
            p *= emit[j, pos + 1] if real else emit[j, 0]
            mem = pos
        if p == 0.0:
            continue
        total += p
        for j, state in enumerate(seq):
            post[j, state % l + 1 if state < l else 0] += p
        for prev, nxt in moves:
            n_jump[int(np.clip(nxt - prev, -max_jump, max_jump)) + max_jump] += p
            key = (prev, l - 1 - prev)
            n_ctx[key] = n_ctx.get(key, 0.0) + p
        path = tuple(s % l + 1 if s < l else 0 for s in seq)
        best_of_path[path] = max(best_of_path.get(path, 0.0), p)
    return total, post / total, best_of_path, n_jump / total, {k: v / total for k, v in n_ctx.items()}


def _pair_emissions(view, t, k):
    cells = view.cells[view.cell_offsets[k]:view.cell_offsets[k + 1]]
    l, m = int(view.cond_len[k]), int(view.gen_len[k])
    return t[cells].reshape(l + 1, m + 1)[:, 1:].T


@pytest.mark.parametrize("seed", range(6))
@pytest.mark.parametrize("direction", ["forward", "reverse"])
def test_forward_backward_matches_enumeration(seed, direction):
    rng = np.random.default_rng(seed)
    pairs = random_corpus(rng, 5, max_len=3, n_src_words=6, n_tgt_words=6) + [([1, 2, 3], [4, 5, 6, 1])]
    block = make_block(pairs)
    view = block.view(direction)
    t = rng.uniform(0.01, 1.0, size=len(block.dict_keys))
    max_jump, p_null = 1, 0.25
    jump = rng.uniform(0.1, 1.0, size=hmm.n_buckets(max_jump))

    gc, post, stats, loglik = hmm.forward_backward(view, t, jump, p_null, max_jump)
    path = hmm.viterbi(view, t, jump, p_null, max_jump)
    counts, stats2, total_ll = hmm.e_step(view, t, jump, p_null, max_jump)
    assert np.array_equal(stats, stats2) and total_ll == pytest.approx(loglik.sum())
    assert np.allclose(hmm.pair_loglik(view, t, jump, p_null, max_jump), loglik, atol=1e-12)

    want_jump = np.zeros(hmm.n_buckets(max_jump))
    want_ctx = np.zeros(len(stats) - len(want_jump))
    link0, tok0 = 0, 0
    for k in range(view.n_pairs):
        l, m = int(view.cond_len[k]), int(view.gen_len[k])
        lik, want_post, path_probs, n_jump, n_ctx = brute_force_pair(_pair_emissions(view, t, k), jump, p_null, max_jump)
        assert loglik[k] == pytest.approx(math.log(lik), abs=1e-9)
        got = post[link0:link0 + m * (l + 1)].reshape(m, l + 1)
        assert np.allclose(got, want_post, atol=1e-9)
        # Viterbi: the kernel's path is a most probable one (ties happen with repeated words).
        top = max(path_probs.values())
        assert path_probs[tuple(path[tok0:tok0 + m].tolist())] == pytest.approx(top, rel=1e-12)
        want_jump += n_jump
        for (a, r), v in n_ctx.items():
            want_ctx[a * (hmm.CONTEXT_CAP + 1) + r] += v
        link0, tok0 = link0 + m * (l + 1), tok0 + m
    assert np.allclose(stats[:len(want_jump)], want_jump, atol=1e-9)
    assert np.allclose(stats[len(want_jump):], want_ctx, atol=1e-9)
    # Lexical counts are the link posteriors summed per dictionary entry.
    assert np.allclose(counts, np.bincount(view.cells[gc.flat], weights=post, minlength=len(t)))



def test_reverse_direction_reads_the_stored_grid_and_equals_the_transposed_one():
    """The HMM's passes read the reverse direction's cells from the grid as stored (gen-major), without
    transposing it, and give bit for bit what they give on the transposed cells (empty sides included)."""
    import dataclasses

    rng = np.random.default_rng(12)
    pairs = random_corpus(rng, 50, max_len=8, n_src_words=10, n_tgt_words=9) + [([], [1, 2]), ([3], [])]
    block = make_block(pairs)
    t = rng.uniform(0.01, 1.0, size=len(block.dict_keys))
    jump = rng.uniform(0.1, 1.0, size=hmm.n_buckets(3))
    view = block.view("reverse")
    got = (hmm.forward_backward(view, t, jump, 0.2, 3)[1:], hmm.viterbi(view, t, jump, 0.2, 3),
           hmm.e_step(view, t, jump, 0.2, 3))
    assert view.gen_major and "cells" not in vars(view)  # no transpose made
    transposed = dataclasses.replace(view, grid=view.cells, gen_major=False)
    want = (hmm.forward_backward(transposed, t, jump, 0.2, 3)[1:], hmm.viterbi(transposed, t, jump, 0.2, 3),
            hmm.e_step(transposed, t, jump, 0.2, 3))
    for a, b in zip([*got[0], got[1], *got[2]], [*want[0], want[1], *want[2]]):
        np.testing.assert_array_equal(a, b)

def test_a_block_equals_its_pairs_one_at_a_time():
    rng = np.random.default_rng(11)
    pairs = random_corpus(rng, 40, max_len=9, n_src_words=12, n_tgt_words=12)
    block = make_block(pairs)
    t = rng.uniform(0.01, 1.0, size=len(block.dict_keys))
    jump = rng.uniform(0.1, 1.0, size=hmm.n_buckets(3))
    _, post, stats, loglik = hmm.forward_backward(block.view("forward"), t, jump, 0.2, 3)
    path = hmm.viterbi(block.view("forward"), t, jump, 0.2, 3)
    sum_stats = np.zeros_like(stats)
    posts, paths, lls = [], [], []
    for pair in pairs:
        single = make_block([pair])
        # Same t values for the single pair's dictionary entries.
        t1 = t[np.searchsorted(block.dict_keys, single.dict_keys)]
        _, p1, s1, l1 = hmm.forward_backward(single.view("forward"), t1, jump, 0.2, 3)
        posts.append(p1)
        paths.append(hmm.viterbi(single.view("forward"), t1, jump, 0.2, 3))
        lls.append(l1[0])
        sum_stats += s1
    assert np.allclose(post, np.concatenate(posts), atol=1e-12)
    assert np.array_equal(path, np.concatenate(paths))
    assert np.allclose(loglik, lls, atol=1e-10)
    assert np.allclose(stats, sum_stats, atol=1e-10)


def _q_jump(stats, c, max_jump):
    nb = hmm.n_buckets(max_jump)
    mult = hmm._multiplicities(max_jump)
    n_jump, ctx = stats[:nb], stats[nb:]
    keep = ctx > 0
    return n_jump @ np.log(c) - ctx[keep] @ np.log(mult[keep] @ c)


def test_jump_m_step_maximises_expected_loglik():
    rng = np.random.default_rng(4)
    block = make_block(random_corpus(rng, 60, max_len=12, n_src_words=15, n_tgt_words=15))
    t = rng.uniform(0.01, 1.0, size=len(block.dict_keys))
    max_jump = 3
    jump = rng.uniform(0.1, 1.0, size=hmm.n_buckets(max_jump))
    _, stats, _ = hmm.e_step(block.view("forward"), t, jump, 0.2, max_jump)
    new = hmm.jump_m_step(stats, jump, max_jump)
    assert new.sum() == pytest.approx(1.0)
    q_new = _q_jump(stats, new, max_jump)
    assert q_new >= _q_jump(stats, jump / jump.sum(), max_jump)
    for k in range(len(new)):
        for eps in (1e-4, -1e-4):
            other = new.copy()
            other[k] *= 1 + eps
            assert q_new >= _q_jump(stats, other, max_jump) - 1e-12
    # The same expected counts read through the transition matrix: Q computed per (i', i).
    for l in range(1, 6):
        a = hmm.transition_matrix(new, l, max_jump)
        assert np.allclose(a.sum(axis=1), 1.0)


def test_jump_m_step_without_edges_is_plain_normalisation():
    # Contexts with room >= max_jump on both sides allow every bucket once, Z = sum c,
    # so the maximiser is N / sum N: the simple relative-frequency estimate.
    max_jump = 2
    nb = hmm.n_buckets(max_jump)
    stats = np.zeros(hmm.stats_size(max_jump))
    stats[:nb] = [1.0, 2.0, 5.0, 3.0, 1.0]
    stats[nb + 2 * (hmm.CONTEXT_CAP + 1) + 2] = stats[:nb].sum()  # context (a, r) = (2, 2)
    new = hmm.jump_m_step(stats, np.full(nb, 0.2), max_jump)
    assert np.allclose(new, stats[:nb] / stats[:nb].sum(), atol=1e-10)


@pytest.mark.parametrize("options", [{}, {"max_jump": 2, "p_null": 0.1}])
def test_loglik_never_decreases(options):
    model = HMM(**options)
    for seed in range(4):
        rng = np.random.default_rng(300 + seed)
        block = make_block(random_corpus(rng, 30, max_len=10))
        for direction in ("forward", "reverse"):
            logliks = run_em(model, block, 8, direction=direction).logliks
            assert all(b >= a - 1e-9 for a, b in zip(logliks, logliks[1:])), logliks


def test_long_pair_does_not_underflow_and_posteriors_sum_to_one():
    rng = np.random.default_rng(8)
    pairs = [(list(rng.integers(1, 500, 200)), list(rng.integers(1, 500, 200))), ([1, 2], [3])]
    block = make_block(pairs)
    view = block.view("forward")
    t = np.full(len(block.dict_keys), 1.0 / 500)
    model = HMM()
    dense = model.init_dense(None)
    counts, stats, loglik = model.e_step(view, t, dense)
    assert np.isfinite(loglik) and loglik < -1000      # 200 words at t = 1/500 each
    assert np.isfinite(stats).all() and np.isfinite(counts).all()
    assert len(stats) == model.dense_size()
    gc, post, _, _ = hmm.forward_backward(view, t, dense["jump"], 0.2, 7)
    assert np.allclose(np.bincount(gc.token, weights=post), 1.0, atol=1e-9)
    path = hmm.viterbi(view, t, dense["jump"], 0.2, 7)
    assert path.shape == (201,) and (path >= 0).all() and (path <= 200).all()


def test_empty_sides_and_null_only_pairs():
    block = make_block([([], [1, 2]), ([3], []), ([4, 5], [6])])
    view = block.view("forward")
    t = np.full(len(block.dict_keys), 0.5)
    model = HMM()
    dense = model.init_dense(None)
    counts, stats, loglik = model.e_step(view, t, dense)
    ll = model.pair_loglik(view, t, dense)
    assert np.allclose(ll[:2], [2 * math.log(0.5), 0.0]) and ll.sum() == pytest.approx(loglik)
    assert counts.sum() == pytest.approx(3.0)
    assert hmm.viterbi(view, t, dense["jump"], 0.2, 7)[:2].tolist() == [0, 0]


def test_decode_follows_a_monotone_chain():
    # Flat lexical table: only the jumps decide, and learned forward jumps of +1 win.
    block = make_block([([1, 2, 3, 4, 5, 6], [7, 8, 9, 10, 11, 12])])
    view = block.view("forward")
    t = np.full(len(block.dict_keys), 0.1)
    model = HMM()
    jump = np.full(15, 0.01)
    jump[7 + 1] = 1.0
    tok, pos, post = model.decode(view, t, {"jump": jump}, method="viterbi", threshold=0.0)
    assert pos.tolist() == list(range(1, 7)) and tok.tolist() == list(range(6))
    tok_p, pos_p, post_p = model.decode(view, t, {"jump": jump}, method="posterior", threshold=0.5)
    assert (post_p >= 0.5).all() and (pos_p >= 1).all()


@pytest.mark.parametrize("options, message", [
    ({"p_null": 0.0}, "p_null must be a number in"),
    ({"max_jump": 0}, "max_jump must be an integer"),
    ({"jumps": 3}, "unknown option"),
])
def test_bad_options(options, message):
    with pytest.raises(ValueError, match=message):
        HMM(**options)


@pytest.mark.parametrize("model_name", ["ibm1", "ibm2", "ibm2-diagonal", "hmm"])
def test_viterbi_links_pick_what_the_per_link_selection_picks(model_name):
    """The per-token shortcut of the output pass equals selecting among every link (every model, both
    directions, after a few EM iterations so that positions are not uniform)."""
    from spark_align.models import base
    from spark_align.models.ibm1 import IBM1
    from spark_align.models.ibm2 import IBM2, IBM2Diag

    model = {"ibm1": IBM1, "ibm2": IBM2, "ibm2-diagonal": IBM2Diag, "hmm": HMM}[model_name]()
    block = make_block(random_corpus(np.random.default_rng(31), 40, max_len=9, min_len=0))
    for direction in ("forward", "reverse"):
        run = run_em(model, block, 3, direction=direction)
        view = block.view(direction)
        gc, post, best, _ = model.decode_pass(view, run.t, run.dense, method="viterbi")
        assert (best > 0).any()
        want = base.select_links(gc, post, best, method="viterbi", threshold=0.5)
        got = base.viterbi_links(gc, post, best)
        for a, b in zip(got, want):
            np.testing.assert_array_equal(a, b)
