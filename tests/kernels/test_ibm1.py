"""IBM Model 1 kernels against a direct, loop-per-token implementation on small random corpora."""
from __future__ import annotations

import math

import numpy as np
import pytest

from spark_align.kernels import ibm1
from spark_align.models.ibm1 import IBM1
from tests.kernels.local_em import cond_gen_words, make_block, random_corpus, run_em


def _t_lookup(block, direction, t):
    cond, gen = cond_gen_words(block, direction)
    return {(int(c), int(g)): float(p) for c, g, p in zip(cond, gen, t)}


def naive_ibm1(pairs, table, direction):
    """Counts per (cond, gen) word pair, loglik, per-token posteriors over 0..l, per-token argmax."""
    counts, loglik, posts, best = {}, 0.0, [], []
    for src, tgt in pairs:
        cond, gen = (src, tgt) if direction == "forward" else (tgt, src)
        cond = [0] + list(cond)
        for f in gen:
            scores = [table[(e, f)] for e in cond]
            total = sum(scores)
            loglik += math.log(total / len(cond))
            post = [s / total for s in scores]
            posts.append(post)
            arg = 0
            for i, p in enumerate(post):
                if p >= post[arg]:
                    arg = i
            best.append(arg)
            for e, p in zip(cond, post):
                counts[(e, f)] = counts.get((e, f), 0.0) + p
    return counts, loglik, posts, best


@pytest.mark.parametrize("seed", range(4))
@pytest.mark.parametrize("direction", ["forward", "reverse"])
def test_e_step_matches_loops(seed, direction):
    rng = np.random.default_rng(seed)
    pairs = random_corpus(rng, 12, max_len=5, n_src_words=6, n_tgt_words=7)
    block = make_block(pairs)
    t = rng.uniform(0.01, 1.0, size=len(block.dict_keys))
    view = block.view(direction)
    counts, loglik = ibm1.e_step(view, t)
    want_counts, want_loglik, want_posts, want_best = naive_ibm1(pairs, _t_lookup(block, direction, t), direction)

    assert loglik == pytest.approx(want_loglik, abs=1e-9)
    cond, gen = cond_gen_words(block, direction)
    got = {(int(c), int(g)): x for c, g, x in zip(cond, gen, counts)}
    for key, x in want_counts.items():
        assert got[key] == pytest.approx(x, abs=1e-12)
    # Entries no generated token can use (gen side NULL) get nothing.
    assert sum(got.values()) == pytest.approx(sum(want_counts.values()), abs=1e-9)

    gc, post = ibm1.posteriors(view, t)
    assert np.allclose(post, np.concatenate(want_posts), atol=1e-12)
    assert np.allclose(np.bincount(gc.token, weights=post), 1.0, atol=1e-12)

    best, best_post = ibm1.viterbi(view, t)
    assert best.tolist() == want_best
    assert np.allclose(best_post, [p[b] for p, b in zip(want_posts, want_best)])

    per_pair = ibm1.pair_loglik(view, t)
    assert per_pair.sum() == pytest.approx(want_loglik, abs=1e-9)


def test_loglik_never_decreases():
    for seed in range(5):
        rng = np.random.default_rng(100 + seed)
        block = make_block(random_corpus(rng, 25))
        logliks = run_em(IBM1(), block, 10).logliks
        assert all(b >= a - 1e-9 for a, b in zip(logliks, logliks[1:])), logliks


def test_model_decode_drops_null_and_respects_threshold():
    rng = np.random.default_rng(7)
    block = make_block(random_corpus(rng, 10))
    view = block.view("forward")
    t = rng.uniform(0.01, 1.0, size=len(block.dict_keys))
    model = IBM1()
    tok, pos, post = model.decode(view, t, {}, method="posterior", threshold=0.3)
    assert (pos >= 1).all() and (post >= 0.3).all()
    tok_v, pos_v, _ = model.decode(view, t, {}, method="viterbi", threshold=0.0)
    best, _ = ibm1.viterbi(view, t)
    assert np.array_equal(pos_v, best[tok_v]) and len(np.unique(tok_v)) == len(tok_v)
    assert set(range(len(best))) - set(tok_v.tolist()) == set(np.flatnonzero(best == 0).tolist())
    with pytest.raises(ValueError, match="decoding method"):
        model.decode(view, t, {}, method="greedy", threshold=0.0)


def test_reverse_grid_is_each_pairs_grid_transposed():
    from spark_align.kernels import ragged

    block = make_block(random_corpus(np.random.default_rng(4), 40, max_len=9, n_src_words=12, n_tgt_words=15))
    src_len, tgt_len = ragged.lengths(block.src_offsets), ragged.lengths(block.tgt_offsets)
    got = ragged.transpose_grid(src_len, tgt_len, block.grid_offsets, block.grid)
    for p in range(block.n_pairs):
        a, b = block.grid_offsets[p], block.grid_offsets[p + 1]
        want = block.grid[a:b].reshape(src_len[p] + 1, tgt_len[p] + 1).T.ravel()
        np.testing.assert_array_equal(got[a:b], want)



def test_reverse_e_step_reads_the_stored_grid_and_equals_the_transposed_one():
    """Model 1's E-step and posteriors read the reverse direction's cells from the grid as stored
    (gen-major), without transposing it, and give bit for bit what they give on the transposed cells."""
    import dataclasses

    block = make_block(random_corpus(np.random.default_rng(5), 60, max_len=11, n_src_words=14, n_tgt_words=9))
    t = np.random.default_rng(6).uniform(0.01, 1.0, size=len(block.dict_keys))
    view = block.view("reverse")
    counts, loglik = ibm1.e_step(view, t)
    _gc, post, per_pair = ibm1.posteriors_and_loglik(view, t)
    assert view.gen_major and "cells" not in vars(view)  # no transpose made
    transposed = dataclasses.replace(view, grid=view.cells, gen_major=False)
    want_counts, want_loglik = ibm1.e_step(transposed, t)
    assert loglik == want_loglik
    np.testing.assert_array_equal(counts, want_counts)
    _gc, want_post, want_per_pair = ibm1.posteriors_and_loglik(transposed, t)
    np.testing.assert_array_equal(post, want_post)
    np.testing.assert_array_equal(per_pair, want_per_pair)

@pytest.mark.parametrize("forward", [True, False])
def test_links_by_pair_equal_a_lexsort_of_the_links(forward):
    """Token-major links (as decoders give them) in (pair, source, target) order, against numpy's lexsort;
    None for links out of token order or repeated (the caller sorts those)."""
    from spark_align.kernels import ragged

    rng = np.random.default_rng(12)
    gen_len = rng.integers(0, 7, 40)  # empty pairs too
    offsets = ragged.offsets_from_lengths(gen_len)
    token, cond_pos = [], []
    for t in range(int(offsets[-1])):
        chosen = np.sort(rng.choice(9, size=rng.integers(0, 4), replace=False))  # 0: the NULL word
        token += [t] * len(chosen)
        cond_pos += chosen.tolist()
    token, cond_pos = np.array(token, np.int64), np.array(cond_pos, np.int64)
    post = rng.random(len(token))
    pair = np.searchsorted(offsets, token, side="right") - 1
    if forward:
        src_i, tgt_j = cond_pos - 1, token - offsets[pair]
    else:
        src_i, tgt_j = token - offsets[pair], cond_pos - 1
    order = np.lexsort((tgt_j, src_i, pair))
    got = ragged.links_by_pair(offsets, token, cond_pos, post, forward=forward)
    for g, want in zip(got, (pair[order], src_i[order], tgt_j[order], post[order])):
        np.testing.assert_array_equal(g, want)
    swapped = token.copy()
    swapped[[3, 40]] = swapped[[40, 3]]
    assert ragged.links_by_pair(offsets, swapped, cond_pos, post, forward=forward) is None
    repeated = np.insert(cond_pos, 5, cond_pos[5])
    assert ragged.links_by_pair(offsets, np.insert(token, 5, token[5]), repeated, np.insert(post, 5, 0.5),
                                forward=forward) is None
    assert all(len(a) == 0 for a in ragged.links_by_pair(offsets, token[:0], cond_pos[:0], post[:0],
                                                         forward=forward))


def test_values_at_links_equal_a_dictionary_lookup():
    """Each link's value in another sorted list of links (0.0 where absent), against a dict; None for a
    list out of order (the caller searches then)."""
    from spark_align.kernels import ragged

    rng = np.random.default_rng(3)
    every = sorted({(int(p), int(s), int(t)) for p, s, t in rng.integers(0, 12, (600, 3))})
    at = [x for x in every if rng.random() < 0.6]
    query = [x for x in every if rng.random() < 0.5]
    values = rng.random(len(at))
    want = [dict(zip(at, values)).get(x, 0.0) for x in query]
    cols = [np.array(c, np.int64) for c in zip(*query)]
    at_cols = [np.array(c, np.int64) for c in zip(*at)]
    np.testing.assert_array_equal(ragged.values_at_links(*cols, *at_cols, values, 0.0), want)
    backwards = [c[::-1].copy() for c in at_cols]
    assert ragged.values_at_links(*cols, *backwards, values[::-1].copy(), 0.0) is None
    assert ragged.values_at_links(*[c[::-1].copy() for c in cols], *at_cols, values, 0.0) is None
    assert len(ragged.values_at_links(*[c[:0] for c in cols], *at_cols, values, 0.0)) == 0
    np.testing.assert_array_equal(ragged.values_at_links(*cols, *[c[:0] for c in at_cols], values[:0], 0.5),
                                  np.full(len(query), 0.5))


def test_links_at_least_and_argmax_equal_numpy_over_the_link_arrays():
    """The two kernels that walk a view's links from its lengths alone (no per-link index arrays) give
    what numpy gives over the links' token and cond position arrays (pairs with empty sides included)."""
    from spark_align.kernels import ragged

    rng = np.random.default_rng(13)
    cond_len, gen_len = rng.integers(0, 7, 200), rng.integers(0, 7, 200)
    gc = ragged.gen_cells(cond_len, gen_len, ragged.offsets_from_lengths((cond_len + 1) * (gen_len + 1)))
    post = rng.random(gc.n_links)
    post[::7] = 0.25                                             # exactly at the threshold: kept
    keep = (post >= 0.25) & (gc.cond_pos > 0)
    want = (gc.token[keep], gc.cond_pos[keep], post[keep])
    for a, b in zip(ragged.links_at_least(gc, post, 0.25), want):
        np.testing.assert_array_equal(a, b)
        assert a.dtype == b.dtype
    score = rng.integers(0, 3, gc.n_links).astype(np.float64)  # many ties: the later position wins
    want_best = np.zeros(gc.n_tokens, np.int64)
    for k in range(gc.n_links):
        if score[k] >= score[gc.token_starts[gc.token[k]] + want_best[gc.token[k]]]:
            want_best[gc.token[k]] = gc.cond_pos[k]
    np.testing.assert_array_equal(ibm1.argmax_per_token(gc, score), want_best)
    with pytest.raises(ValueError, match="links"):
        ragged.links_at_least(gc, post[1:], 0.25)


def test_gen_cells_enumerates_links_token_major():
    """Every (generated token, cond position) link, tokens in pair order, positions 0..l, and the grid
    cell of each, checked against a plain loop over the pairs."""
    from spark_align.kernels import ragged

    rng = np.random.default_rng(11)
    cond_len, gen_len = rng.integers(0, 6, 30), rng.integers(0, 6, 30)
    cell_offsets = ragged.offsets_from_lengths((cond_len + 1) * (gen_len + 1))
    want_flat, want_token, want_pos = [], [], []
    token = 0
    for p in range(30):
        for j in range(1, gen_len[p] + 1):
            for i in range(cond_len[p] + 1):
                want_flat.append(cell_offsets[p] + i * (gen_len[p] + 1) + j)
                want_token.append(token)
                want_pos.append(i)
            token += 1
    gc = ragged.gen_cells(cond_len, gen_len, cell_offsets)
    assert gc.n_tokens == token == gen_len.sum()
    for got, want in ((gc.flat, want_flat), (gc.token, want_token), (gc.cond_pos, want_pos)):
        np.testing.assert_array_equal(got, np.array(want, np.int64))
