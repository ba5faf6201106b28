"""Symmetrization heuristics and posterior combination.

The heuristics are checked three ways: hand-worked examples (reasoning in the
comments), a literal line-by-line rendering of the published pseudocode
(full grid scans, as recalled from Koehn's *Statistical Machine Translation*,
2010, §4.5; from memory) on many seeded random cases, and the batch functions
against the one-pair functions. The comparison with NLTK lives in
tests/reference/test_nltk_symmetrize.py.
"""
import random

import numpy as np
import pytest

from spark_align.errors import InputError
from spark_align.symmetrize import (
    METHODS,
    LinkArrays,
    ScoredLinkArrays,
    combine_posteriors,
    combine_posteriors_batch,
    symmetrize,
    symmetrize_batch,
)

NEIGHBOURS = ((-1, 0), (0, -1), (1, 0), (0, 1), (-1, -1), (-1, 1), (1, -1), (1, 1))


# ---------------------------------------------------------------------------
# A slow, literal rendering of the published pseudocode
# ---------------------------------------------------------------------------

def literal_pseudocode(forward, reverse, n_src, n_tgt, method):
    """GROW-DIAG(-FINAL(-AND)) exactly as written: whole-grid row-major scans."""
    forward, reverse = set(forward), set(reverse)
    alignment = forward & reverse
    if method == "intersection":
        return sorted(alignment)
    union = forward | reverse
    if method == "union":
        return sorted(union)

    def src_aligned(e):
        return any(a[0] == e for a in alignment)

    def tgt_aligned(f):
        return any(a[1] == f for a in alignment)

    while True:  # iterate until no new points added
        added = False
        for e in range(n_src):
            for f in range(n_tgt):
                if (e, f) in alignment:
                    for de, df in NEIGHBOURS:
                        e_new, f_new = e + de, f + df
                        if (not src_aligned(e_new) or not tgt_aligned(f_new)) and (e_new, f_new) in union:
                            alignment.add((e_new, f_new))
                            added = True
        if not added:
            break
    if method != "grow-diag":
        for links in (forward, reverse):  # FINAL(e2f); FINAL(f2e)
            for e in range(n_src):
                for f in range(n_tgt):
                    if method == "grow-diag-final-and":
                        free = not src_aligned(e) and not tgt_aligned(f)
                    else:
                        free = not src_aligned(e) or not tgt_aligned(f)
                    if free and (e, f) in links:
                        alignment.add((e, f))
    return sorted(alignment)


def random_directional(rng, n_src, n_tgt, p_link=0.8):
    """Links shaped like real model output: forward gives each target word <= 1
    source word, reverse gives each source word <= 1 target word; the two are
    made to agree often, as real directional models do."""
    forward = {(rng.randrange(n_src), j) for j in range(n_tgt) if rng.random() < p_link}
    reverse = set()
    for i in range(n_src):
        if rng.random() < p_link:
            agreeing = [j for (s, j) in forward if s == i]
            j = rng.choice(agreeing) if agreeing and rng.random() < 0.6 else rng.randrange(n_tgt)
            reverse.add((i, j))
    return forward, reverse


def random_any(rng, n_src, n_tgt):
    """Unconstrained link sets (the functions accept any two sets)."""
    cells = [(i, j) for i in range(n_src) for j in range(n_tgt)]
    return ({c for c in cells if rng.random() < 0.3}, {c for c in cells if rng.random() < 0.3})


# ---------------------------------------------------------------------------
# Hand-worked examples
# ---------------------------------------------------------------------------

# 5 x 5 pair.  forward (each target word -> one source word): t0->s0, t1->s1, t4->s4.
#              reverse (each source word -> one target word): s0->t0, s3->t0, s4->t3.
FWD_5 = [(0, 0), (1, 1), (4, 4)]
REV_5 = [(0, 0), (3, 0), (4, 3)]


def test_intersection_and_union_hand_example():
    assert symmetrize(FWD_5, REV_5, n_src=5, n_tgt=5, method="intersection") == [(0, 0)]
    assert symmetrize(FWD_5, REV_5, n_src=5, n_tgt=5, method="union") == [(0, 0), (1, 1), (3, 0), (4, 3), (4, 4)]


def test_grow_diag_hand_example():
    # Start from the intersection {(0,0)}.  Pass 1 visits (0,0): its diagonal
    # neighbour (1,1) is in the union and source word 1 is unaligned, so it is
    # added; (1,1) lies later in the row-major scan, so it is visited in the same
    # pass, but none of its neighbours is in the union.  (3,0), (4,3), (4,4) touch
    # no kept link ((3,0)'s neighbours are rows 2-4, columns 0-1), so pass 2 adds
    # nothing and growing stops.
    assert symmetrize(FWD_5, REV_5, n_src=5, n_tgt=5, method="grow-diag") == [(0, 0), (1, 1)]


def test_grow_diag_final_hand_example():
    # After grow-diag {(0,0),(1,1)}: FINAL(forward) scans forward links row-major:
    # (4,4) has source 4 unaligned -> added.  FINAL(reverse): (3,0) has source 3
    # unaligned (target 0 is aligned, but "or" suffices) -> added; (4,3) has target 3
    # unaligned (source 4 now aligned) -> added.  Every union link ends up kept.
    assert symmetrize(FWD_5, REV_5, n_src=5, n_tgt=5, method="grow-diag-final") == [
        (0, 0), (1, 1), (3, 0), (4, 3), (4, 4)]


def test_grow_diag_final_and_hand_example():
    # Same start.  FINAL-AND(forward): (4,4), both words unaligned -> added.
    # FINAL-AND(reverse): (3,0) has target 0 aligned -> skipped; (4,3) has source 4
    # aligned (by (4,4) just added) -> skipped.
    assert symmetrize(FWD_5, REV_5, n_src=5, n_tgt=5, method="grow-diag-final-and") == [(0, 0), (1, 1), (4, 4)]


def test_final_and_runs_forward_before_reverse():
    # Swapping the directions changes which of (4,4) / (4,3) wins source word 4:
    # the direction scanned first takes it.  The documented order is forward first.
    swapped = symmetrize([(0, 0), (1, 1), (4, 3)], [(0, 0), (3, 0), (4, 4)], n_src=5, n_tgt=5,
                         method="grow-diag-final-and")
    assert swapped == [(0, 0), (1, 1), (4, 3)]


def test_grow_diag_neighbour_order_decides_blocking():
    # 3 x 3, general sets.  Intersection {(1,1)}; union adds (1,2), (2,1), (2,2).
    # Visiting (1,1), neighbours are tried in the order (-1,0) (0,-1) (1,0) (0,1) then
    # the diagonals: (2,1) comes first (source 2 free) -> added; then (1,2) (target 2
    # free) -> added; then diagonal (2,2): source 2 and target 2 are both aligned ->
    # blocked.  Trying diagonals first would have kept (2,2) and blocked the others.
    out = symmetrize([(1, 1), (1, 2), (2, 2)], [(1, 1), (2, 1)], n_src=3, n_tgt=3, method="grow-diag")
    assert out == [(1, 1), (1, 2), (2, 1)]


def test_grow_diag_needs_several_passes_for_links_behind_the_scan():
    # Intersection {(3,3)}; the union adds the diagonal chain (2,2), (1,1), (0,0),
    # each with both words free.  (2,2) is added while visiting (3,3) but lies
    # earlier in the scan, so it is only visited in pass 2, which adds (1,1), and so
    # on: four passes, and the whole chain is kept.
    forward = [(0, 0), (1, 1), (2, 2), (3, 3)]
    assert symmetrize(forward, [(3, 3)], n_src=4, n_tgt=4, method="grow-diag") == forward


def test_agreeing_directions_give_the_same_links_for_every_method():
    links = [(0, 1), (1, 0), (2, 2)]
    for method in METHODS:
        assert symmetrize(links, links, n_src=3, n_tgt=3, method=method) == links


def test_empty_inputs():
    for method in METHODS:
        assert symmetrize([], [], n_src=0, n_tgt=0, method=method) == []
        assert symmetrize([], [], n_src=3, n_tgt=2, method=method) == []


def test_order_and_containment_properties():
    # intersection ⊆ grow-diag ⊆ grow-diag-final-and ⊆ grow-diag-final ⊆ union
    # (final-and adds a subset of what final adds at each step; common practice, no source).
    rng = random.Random(7)
    for _ in range(300):
        n_src, n_tgt = rng.randint(1, 8), rng.randint(1, 8)
        fwd, rev = random_directional(rng, n_src, n_tgt)
        out = {m: set(symmetrize(fwd, rev, n_src=n_src, n_tgt=n_tgt, method=m)) for m in METHODS}
        assert out["intersection"] <= out["grow-diag"] <= out["grow-diag-final-and"] <= out["union"]
        assert out["grow-diag"] <= out["grow-diag-final"] <= out["union"]


# ---------------------------------------------------------------------------
# Fast implementation == literal pseudocode
# ---------------------------------------------------------------------------

@pytest.mark.parametrize("method", METHODS)
def test_matches_literal_pseudocode_on_random_cases(method):
    rng = random.Random(1234)
    n_differs_from_union = 0
    for case in range(600):
        n_src, n_tgt = rng.randint(1, 7), rng.randint(1, 7)
        fwd, rev = random_directional(rng, n_src, n_tgt) if case % 2 else random_any(rng, n_src, n_tgt)
        expected = literal_pseudocode(fwd, rev, n_src, n_tgt, method)
        assert symmetrize(fwd, rev, n_src=n_src, n_tgt=n_tgt, method=method) == expected, (fwd, rev, n_src, n_tgt)
        n_differs_from_union += expected != sorted(fwd | rev)
    if method != "union":
        # The random cases must exercise blocking, or the comparison proves little.
        assert n_differs_from_union > 50


def test_input_errors():
    with pytest.raises(InputError, match="unknown symmetrization method 'grow'"):
        symmetrize([], [], n_src=1, n_tgt=1, method="grow")
    with pytest.raises(InputError, match=r"forward alignment: link 2-0 is outside the 2 x 3"):
        symmetrize([(2, 0)], [], n_src=2, n_tgt=3)
    with pytest.raises(InputError, match=r"reverse alignment: link 0--1 is outside"):
        symmetrize([], [(0, -1)], n_src=2, n_tgt=3)


# ---------------------------------------------------------------------------
# Batch == one pair at a time
# ---------------------------------------------------------------------------

def to_csr(per_pair, with_posterior=False):
    offsets = np.zeros(len(per_pair) + 1, dtype=np.int64)
    offsets[1:] = np.cumsum([len(p) for p in per_pair])
    flat = [link for pair in per_pair for link in pair]
    src = np.array([x[0] for x in flat], dtype=np.int32)
    tgt = np.array([x[1] for x in flat], dtype=np.int32)
    if with_posterior:
        return ScoredLinkArrays(offsets, src, tgt, np.array([x[2] for x in flat], dtype=np.float64))
    return LinkArrays(offsets, src, tgt)


def from_csr(links):
    return [list(zip(links.src_index[a:b].tolist(), links.tgt_index[a:b].tolist()))
            for a, b in zip(links.offsets[:-1].tolist(), links.offsets[1:].tolist())]


@pytest.mark.parametrize("method", METHODS)
def test_batch_matches_single_pair(method):
    rng = random.Random(99)
    n_src = [rng.randint(0, 9) for _ in range(200)]
    n_tgt = [rng.randint(0, 9) if s else 0 for s in n_src]
    fwd, rev = [], []
    for s, t in zip(n_src, n_tgt):
        f, r = random_directional(rng, s, t) if s and t else (set(), set())
        # Shuffled and with a repeated link: the batch must not depend on input order or duplicates.
        f, r = list(f) + list(f)[:1], list(r)
        rng.shuffle(f)
        rng.shuffle(r)
        fwd.append(f)
        rev.append(r)
    out = symmetrize_batch(to_csr(fwd), to_csr(rev), n_src=np.array(n_src), n_tgt=np.array(n_tgt), method=method)
    assert out.offsets.dtype == np.int64 and out.src_index.dtype == np.int32 and out.tgt_index.dtype == np.int32
    expected = [symmetrize(f, r, n_src=s, n_tgt=t, method=method) for f, r, s, t in zip(fwd, rev, n_src, n_tgt)]
    assert from_csr(out) == expected


def test_batch_errors_name_the_pair():
    fwd = to_csr([[(0, 0)], [(0, 0), (1, 3)]])
    rev = to_csr([[], []])
    with pytest.raises(InputError, match=r"forward alignment: pair 1: link 1-3 is outside the 2 x 2"):
        symmetrize_batch(fwd, rev, n_src=np.array([1, 2]), n_tgt=np.array([1, 2]))
    with pytest.raises(InputError, match="expected 2 offsets for 1 pairs"):
        symmetrize_batch(fwd, rev, n_src=np.array([1]), n_tgt=np.array([1]))


# ---------------------------------------------------------------------------
# Posterior combination
# ---------------------------------------------------------------------------

def test_combine_posteriors_hand_example():
    forward = [(0, 0, 0.9), (1, 1, 0.6), (2, 1, 0.4)]
    reverse = [(0, 0, 0.7), (1, 1, 0.3), (2, 2, 1.0)]
    # (0,0): (0.9+0.7)/2 = 0.8 kept; (1,1): (0.6+0.3)/2 = 0.45 dropped;
    # (2,1): (0.4+0)/2 = 0.2 dropped; (2,2): (0+1.0)/2 = 0.5 kept (>= is inclusive).
    out = combine_posteriors(forward, reverse, threshold=0.5)
    assert [(i, j) for i, j, _ in out] == [(0, 0), (2, 2)]
    assert [p for _, _, p in out] == pytest.approx([0.8, 0.5])
    assert [(i, j) for i, j, _ in combine_posteriors(forward, reverse, threshold=0.2)] == [
        (0, 0), (1, 1), (2, 1), (2, 2)]


def test_combine_posteriors_errors():
    with pytest.raises(InputError, match="threshold must be in"):
        combine_posteriors([], [], threshold=0.0)
    with pytest.raises(InputError, match="forward posteriors: link 0-0 is listed twice"):
        combine_posteriors([(0, 0, 0.5), (0, 0, 0.5)], [], threshold=0.5)
    with pytest.raises(InputError, match="reverse posteriors: link 1-2 has posterior 1.5"):
        combine_posteriors([], [(1, 2, 1.5)], threshold=0.5)


def test_combine_posteriors_batch_matches_single_pair():
    rng = random.Random(5)
    n_src = [rng.randint(1, 8) for _ in range(150)]
    n_tgt = [rng.randint(1, 8) for _ in range(150)]
    fwd, rev = [], []
    for s, t in zip(n_src, n_tgt):
        cells = [(i, j) for i in range(s) for j in range(t)]
        fwd.append([(i, j, rng.choice([0.0, 0.25, 0.5, 1.0, rng.random()])) for i, j in cells if rng.random() < 0.4])
        rev.append([(i, j, rng.choice([0.0, 0.25, 0.5, 1.0, rng.random()])) for i, j in cells if rng.random() < 0.4])
    for threshold in (0.125, 0.5, 1.0):
        out = combine_posteriors_batch(to_csr(fwd, True), to_csr(rev, True), n_src=np.array(n_src),
                                       n_tgt=np.array(n_tgt), threshold=threshold)
        for p, (f, r) in enumerate(zip(fwd, rev)):
            a, b = out.offsets[p], out.offsets[p + 1]
            expected = combine_posteriors(f, r, threshold=threshold)
            assert list(zip(out.src_index[a:b].tolist(), out.tgt_index[a:b].tolist())) == [(i, j) for i, j, _ in expected]
            assert out.posterior[a:b].tolist() == pytest.approx([x for _, _, x in expected])


def test_combine_posteriors_batch_errors_name_the_pair():
    fwd = to_csr([[(0, 0, 0.5)], [(1, 1, 0.5), (1, 1, 0.2)]], True)
    rev = to_csr([[], []], True)
    with pytest.raises(InputError, match="forward posteriors: pair 1: link 1-1 is listed twice"):
        combine_posteriors_batch(fwd, rev, n_src=np.array([1, 2]), n_tgt=np.array([1, 2]))
