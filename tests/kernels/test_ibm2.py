"""Model 2 kernels (classic and diagonal) against brute-force enumeration and EM's guarantees."""
from __future__ import annotations

import itertools
import math

import numpy as np
import pytest

from spark_align.kernels import ibm2
from spark_align.models.ibm2 import IBM2, IBM2Diag
from tests.kernels import ibm2_links
from tests.kernels.local_em import cond_gen_words, make_block, random_corpus, run_em


def _classic_a(table, cap):
    """a(i | j, l, m) read straight from the definition (tiny lengths, l, m <= cap)."""
    offsets, _ = ibm2.table_offsets(cap)
    return lambda i, j, l, m: table[offsets[l, m] + (j - 1) * (l + 1) + i]


def _diag_a(p_null, lam):
    def a(i, j, l, m):
        if l == 0:
            return 1.0
        if i == 0:
            return p_null
        z = sum(math.exp(-lam * abs(k / l - j / m)) for k in range(1, l + 1))
        return (1 - p_null) * math.exp(-lam * abs(i / l - j / m)) / z
    return a


def brute_force(pairs, t, block, direction, a):
    """Enumerate every alignment of every pair: (loglik per pair, link posteriors token-major, argmax)."""
    cond_w, gen_w = cond_gen_words(block, direction)
    table = {(int(c), int(g)): float(p) for c, g, p in zip(cond_w, gen_w, t)}
    logliks, posts, best = [], [], []
    for src, tgt in pairs:
        cond, gen = (src, tgt) if direction == "forward" else (tgt, src)
        cond = [0] + list(cond)
        l, m = len(cond) - 1, len(gen)
        total, marg, top, top_p = 0.0, np.zeros((m, l + 1)), None, -1.0
        for align in itertools.product(range(l + 1), repeat=m):
            p = 1.0
            for j, i in enumerate(align, start=1):
                p *= a(i, j, l, m) * table[(cond[i], gen[j - 1])]
            total += p
            for j, i in enumerate(align):
                marg[j, i] += p
            if p >= top_p:  # ties: the later alignment, i.e. later positions (kernel convention)
                top, top_p = align, p
        logliks.append(math.log(total) if m else 0.0)
        posts.extend(marg / total)
        best.extend(top or ())
    return np.array(logliks), np.concatenate(posts) if posts else np.zeros(0), np.array(best)


def _tiny_pairs(rng, n=6):
    return random_corpus(rng, n, max_len=3, n_src_words=5, n_tgt_words=5)


@pytest.mark.parametrize("seed", range(4))
@pytest.mark.parametrize("direction", ["forward", "reverse"])
def test_classic_matches_enumeration(seed, direction):
    rng = np.random.default_rng(seed)
    pairs = _tiny_pairs(rng)
    block = make_block(pairs)
    view = block.view(direction)
    cap = 3
    t = rng.uniform(0.01, 1.0, size=len(block.dict_keys))
    table = ibm2.normalize_table(rng.uniform(0.1, 1.0, ibm2.table_size(cap)), ibm2.uniform_table(cap), cap)
    want_ll, want_post, want_best = brute_force(pairs, t, block, direction, _classic_a(table, cap))

    counts, table_counts, loglik = ibm2.e_step(view, t, table, cap)
    assert loglik == pytest.approx(want_ll.sum(), abs=1e-9)
    assert np.allclose(ibm2.pair_loglik(view, t, table, cap), want_ll, atol=1e-9)
    gc, post = ibm2.posteriors(view, t, table, cap)
    assert np.allclose(post, want_post, atol=1e-9)
    assert np.allclose(np.bincount(gc.token, weights=post), 1.0, atol=1e-12)
    best, _ = ibm2.viterbi_from_posteriors(gc, post)
    assert np.array_equal(best, want_best)
    # Expected table counts: every link's posterior lands on its own (i, j, l, m) entry.
    assert table_counts.sum() == pytest.approx(gc.n_tokens)
    assert counts.sum() == pytest.approx(gc.n_tokens)


@pytest.mark.parametrize("seed", range(4))
@pytest.mark.parametrize("direction", ["forward", "reverse"])
def test_diag_matches_enumeration(seed, direction):
    rng = np.random.default_rng(10 + seed)
    pairs = _tiny_pairs(rng)
    block = make_block(pairs)
    view = block.view(direction)
    t = rng.uniform(0.01, 1.0, size=len(block.dict_keys))
    p_null, lam = 0.1, 3.0
    want_ll, want_post, want_best = brute_force(pairs, t, block, direction, _diag_a(p_null, lam))
    counts, feature, mass, loglik = ibm2.diag_e_step(view, t, p_null, lam, 30)
    assert loglik == pytest.approx(want_ll.sum(), abs=1e-9)
    assert np.allclose(ibm2.diag_pair_loglik(view, t, p_null, lam), want_ll, atol=1e-9)
    gc, post = ibm2.diag_posteriors(view, t, p_null, lam)
    assert np.allclose(post, want_post, atol=1e-9)
    assert np.allclose(np.bincount(gc.token, weights=post), 1.0, atol=1e-12)
    assert np.array_equal(ibm2.viterbi_from_posteriors(gc, post)[0], want_best)
    # Non-NULL mass per context adds up to the non-NULL posterior mass.
    assert mass.sum() == pytest.approx(post[gc.cond_pos > 0].sum())


@pytest.mark.parametrize("direction", ["forward", "reverse"])
def test_compiled_kernels_equal_the_numpy_link_formulas(direction):
    """The compiled E-steps and decoding give what the link-level numpy formulas give
    (``tests/kernels/ibm2_links.py``), on sentences longer than the cap (binned positions, bin sizes)
    and empty sides: posteriors and per-pair log-likelihoods; lexical counts and table counts as the
    posteriors summed per entry, feature, context masses and log-likelihood."""
    rng = np.random.default_rng(21)
    pairs = random_corpus(rng, 60, max_len=14, n_src_words=9, n_tgt_words=9) + [([], [1, 2]), ([3], [])]
    block = make_block(pairs)
    view = block.view(direction)
    t = rng.uniform(0.01, 1.0, size=len(block.dict_keys))
    cap = 4
    table = ibm2.normalize_table(rng.uniform(0.1, 1.0, ibm2.table_size(cap)), ibm2.uniform_table(cap), cap)
    assert view.cond_len.max() > cap and view.gen_len.max() > cap
    gc = view.gen_cells()
    a, idx = ibm2_links.align_probs(view, gc, table, cap)
    post, per_pair = ibm2_links.posteriors_and_loglik(view, t, a)
    np.testing.assert_allclose(ibm2.posteriors(view, t, table, cap)[1], post, rtol=1e-13)
    np.testing.assert_allclose(ibm2.pair_loglik(view, t, table, cap), per_pair, rtol=1e-13)
    counts, table_counts, loglik = ibm2.e_step(view, t, table, cap)
    np.testing.assert_allclose(counts, np.bincount(view.cells[gc.flat], weights=post, minlength=len(t)), rtol=1e-12)
    np.testing.assert_allclose(table_counts, np.bincount(idx, weights=post, minlength=len(table)), rtol=1e-12,
                               atol=1e-15)
    assert loglik == pytest.approx(per_pair.sum(), rel=1e-12)

    p_null, lam = 0.15, 2.5
    post, per_pair = ibm2_links.posteriors_and_loglik(view, t, ibm2_links.diag_align_probs(view, gc, p_null, lam))
    np.testing.assert_allclose(ibm2.diag_posteriors(view, t, p_null, lam)[1], post, rtol=1e-13)
    np.testing.assert_allclose(ibm2.diag_pair_loglik(view, t, p_null, lam), per_pair, rtol=1e-13)
    counts, feature, mass, loglik = ibm2.diag_e_step(view, t, p_null, lam, cap)
    j, l, m = ibm2_links.link_geometry(view, gc)
    real = gc.cond_pos > 0
    np.testing.assert_allclose(counts, np.bincount(view.cells[gc.flat], weights=post, minlength=len(t)), rtol=1e-12)
    assert feature == pytest.approx(float(np.dot(post, ibm2_links.diag_feature(gc.cond_pos, j, l, m))), rel=1e-12)
    want_mass = np.bincount(ibm2_links.diag_context_index(j[real], l[real], m[real], cap), weights=post[real],
                            minlength=ibm2.diag_n_contexts(cap))
    np.testing.assert_allclose(mass, want_mass, rtol=1e-12, atol=1e-15)
    assert loglik == pytest.approx(per_pair.sum(), rel=1e-12)


def test_reverse_kernels_read_the_stored_grid_and_equal_the_transposed_one():
    """Both Model 2 E-steps and both decoders read the reverse direction's cells from the grid as stored
    (gen-major), without transposing it or making per-link index arrays, and give bit for bit what they
    give on the transposed cells."""
    import dataclasses

    rng = np.random.default_rng(22)
    block = make_block(random_corpus(rng, 60, max_len=14, n_src_words=9, n_tgt_words=9) + [([], [1, 2]), ([3], [])])
    t = rng.uniform(0.01, 1.0, size=len(block.dict_keys))
    cap = 4
    table = ibm2.normalize_table(rng.uniform(0.1, 1.0, ibm2.table_size(cap)), ibm2.uniform_table(cap), cap)
    view = block.view("reverse")

    def everything(v):
        gc, post = ibm2.posteriors(v, t, table, cap)
        diag_gc, diag_post = ibm2.diag_posteriors(v, t, 0.15, 2.5)
        assert "_arrays" not in vars(gc) and "_arrays" not in vars(diag_gc)  # no per-link index arrays
        return (*ibm2.e_step(v, t, table, cap), *ibm2.diag_e_step(v, t, 0.15, 2.5, cap), post, diag_post,
                ibm2.pair_loglik(v, t, table, cap), ibm2.diag_pair_loglik(v, t, 0.15, 2.5))

    got = everything(view)
    assert view.gen_major and "cells" not in vars(view)  # no transpose made
    transposed = dataclasses.replace(view, grid=view.cells, gen_major=False)
    want = everything(transposed)
    for a, b in zip(got, want):
        np.testing.assert_array_equal(a, b)

def test_long_sides_share_rows_and_stay_normalised():
    cap = 4
    rng = np.random.default_rng(3)
    table = ibm2.normalize_table(rng.uniform(0.1, 1.0, ibm2.table_size(cap)), ibm2.uniform_table(cap), cap)
    for l, m in [(9, 3), (2, 11), (13, 17), (4, 4), (5, 4)]:
        i = np.tile(np.arange(l + 1), m)
        j = np.repeat(np.arange(1, m + 1), l + 1)
        idx, size = ibm2_links.table_index(i, j, np.full_like(i, l), np.full_like(i, m), cap)
        a = (table[idx] / size).reshape(m, l + 1)
        assert np.allclose(a.sum(axis=1), 1.0), (l, m)
        assert idx.max() < ibm2.table_size(cap)
    # Within the cap every (i, j, l, m) has its own entry.
    idx = [ibm2_links.table_index(np.array([i]), np.array([j]), np.array([l]), np.array([m]), cap)[0][0]
           for l in range(cap + 1) for m in range(1, cap + 1) for j in range(1, m + 1) for i in range(l + 1)]
    assert sorted(idx) == list(range(ibm2.table_size(cap)))


def test_table_size_documented():
    assert ibm2.table_size(20) == 48_510
    assert ibm2.table_size(30) == 230_640


def test_normalize_table_floors_and_keeps_unseen_rows():
    cap = 2
    counts = np.zeros(ibm2.table_size(cap))
    offsets, _ = ibm2.table_offsets(cap)
    counts[offsets[1, 1]:offsets[1, 1] + 2] = [3.0, 0.0]   # row (j=1, l=1, m=1)
    prev = ibm2.uniform_table(cap)
    new = ibm2.normalize_table(counts, prev, cap)
    assert new[offsets[1, 1]] == 1.0 and new[offsets[1, 1] + 1] == 1e-12
    untouched = np.ones(len(counts), bool)
    untouched[offsets[1, 1]:offsets[1, 1] + 2] = False
    assert np.array_equal(new[untouched], prev[untouched])


def _q(feature, mass, lam, cap):
    h, valid = ibm2._context_features(cap)
    s = np.where(valid, lam * h, -np.inf)
    logz = np.log(np.exp(s).sum(axis=1))
    return lam * feature - mass @ logz


def test_lambda_m_step_maximises_q():
    rng = np.random.default_rng(5)
    pairs = random_corpus(rng, 40, max_len=8)
    block = make_block(pairs)
    view = block.view("forward")
    t = rng.uniform(0.01, 1.0, size=len(block.dict_keys))
    cap = 8
    _, feature, mass, _ = ibm2.diag_e_step(view, t, 0.08, 4.0, cap)
    lam = ibm2.diag_lambda_m_step(feature, mass, 4.0, cap)
    assert 0.0 < lam < ibm2.LAMBDA_MAX
    q = _q(feature, mass, lam, cap)
    for other in (lam - 1e-3, lam + 1e-3, 4.0, 0.0, 20.0):
        assert q >= _q(feature, mass, other, cap) - 1e-12
    # Q at the optimum equals the model's expected complete log-likelihood part from the E-step:
    # lam * E[h] - sum_tokens P(real) log Z evaluated link by link.
    gc = view.gen_cells()
    j, l, m = ibm2_links.link_geometry(view, gc)
    h = ibm2_links.diag_feature(gc.cond_pos, j, l, m)
    real = gc.cond_pos > 0
    z = np.bincount(gc.token, weights=np.where(real, np.exp(lam * h), 0.0), minlength=gc.n_tokens)
    _, post = ibm2.diag_posteriors(view, t, 0.08, 4.0)
    direct = lam * feature - np.bincount(gc.token, weights=np.where(real, post, 0.0)) @ np.log(z)
    assert q == pytest.approx(direct, rel=1e-12)


@pytest.mark.parametrize("model", [IBM2(max_length_cap=3), IBM2(), IBM2Diag(max_length_cap=8),
                                   IBM2Diag(p_null=0.2, init_lambda=0.5)])
def test_loglik_never_decreases(model):
    for seed in range(4):
        rng = np.random.default_rng(200 + seed)
        block = make_block(random_corpus(rng, 30, max_len=8))
        for direction in ("forward", "reverse"):
            logliks = run_em(model, block, 8, direction=direction).logliks
            assert all(b >= a - 1e-9 for a, b in zip(logliks, logliks[1:])), logliks


@pytest.mark.parametrize("model", [IBM2(), IBM2Diag()])
def test_posteriors_sum_to_one_and_long_pair_is_finite(model):
    rng = np.random.default_rng(9)
    pairs = random_corpus(rng, 5, max_len=7) + [(list(rng.integers(1, 300, 200)), list(rng.integers(1, 300, 200)))]
    block = make_block(pairs)
    view = block.view("forward")
    t = np.full(len(block.dict_keys), 1.0 / 300)
    dense = model.init_dense(None)
    counts, stats, loglik = model.e_step(view, t, dense)
    assert len(stats) == model.dense_size() and np.isfinite(stats).all()
    assert np.isfinite(loglik) and loglik < 0
    assert np.isfinite(model.pair_loglik(view, t, dense)).all()
    assert counts.sum() == pytest.approx(int(view.gen_len.sum()))
    tok, pos, post = model.decode(view, t, dense, method="posterior", threshold=0.0)
    per_token = np.bincount(tok, weights=post, minlength=int(view.gen_len.sum()))
    assert (per_token <= 1 + 1e-9).all() and (pos >= 1).all()


def test_diag_favours_diagonal():
    # Every word equally likely everywhere: the alignment probabilities alone decide the links.
    block = make_block([([1, 2, 3, 4, 5], [6, 7, 8, 9, 10])])
    view = block.view("forward")
    t = np.full(len(block.dict_keys), 0.1)
    model = IBM2Diag()
    tok, pos, _ = model.decode(view, t, model.init_dense(None), method="viterbi", threshold=0.0)
    assert tok.tolist() == [0, 1, 2, 3, 4] and pos.tolist() == [1, 2, 3, 4, 5]


def test_empty_sides():
    block = make_block([([], [1, 2]), ([3], []), ([4, 5], [6])])
    view = block.view("forward")
    t = np.full(len(block.dict_keys), 0.5)
    for model in (IBM2(), IBM2Diag()):
        dense = model.init_dense(None)
        counts, stats, loglik = model.e_step(view, t, dense)
        ll = model.pair_loglik(view, t, dense)
        assert np.allclose(ll[:2], [2 * math.log(0.5), 0.0]) and ll.sum() == pytest.approx(loglik)
        assert counts.sum() == pytest.approx(3.0)


@pytest.mark.parametrize("cls, options, message", [
    (IBM2, {"max_length_cap": 0}, "max_length_cap must be an integer"),
    (IBM2, {"cap": 3}, "unknown option"),
    (IBM2Diag, {"p_null": 1.0}, "p_null must be a number in"),
    (IBM2Diag, {"init_lambda": -1}, "init_lambda"),
    (IBM2Diag, {"learn_lambda": "yes"}, "learn_lambda must be true or false"),
])
def test_bad_options(cls, options, message):
    with pytest.raises(ValueError, match=message):
        cls(**options)


def test_fixed_lambda_stays_and_init_dense_continues():
    model = IBM2Diag(learn_lambda=False, init_lambda=2.5)
    dense = model.init_dense(None)
    assert model.m_step_dense(np.ones(model.dense_size()), dense)["lambda"][0] == 2.5
    assert IBM2Diag().init_dense({"lambda": np.array([7.0])})["lambda"][0] == 7.0
    prev = {"align_table": np.full(IBM2().dense_size(), 0.3)}
    assert np.array_equal(IBM2().init_dense(prev)["align_table"], prev["align_table"])
    assert np.array_equal(IBM2().init_dense({"lambda": np.array([1.0])})["align_table"], ibm2.uniform_table(20))
