"""IBM Model 2 EM over blocks against NLTK's ``nltk.translate.IBMModel2`` (reference library).

Conventions matched by reading NLTK's source: ``IBMModel2(corpus, n)`` without
probability tables first trains ``IBMModel1(corpus, 2 * n)`` (uniform start
1 / len(trg_vocab)), then sets a(i | j, l, m) = 1 / (l + 1) for every (l, m) in
the corpus and runs n Model 2 iterations; each M-step floors estimates at
1e-12. We run the same schedule with our kernels: 2n IBM1 iterations, then n
IBM2 iterations from that lexical table and a uniform alignment table. The
corpus repeats no target word within a sentence (NLTK's per-word normaliser is
exact EM only then) and has no side longer than the table cap, where our table
is the classic one.
"""
from __future__ import annotations

import pytest
from nltk.translate import AlignedSent, IBMModel2

from spark_align.kernels import ibm2
from spark_align.models.ibm1 import IBM1
from spark_align.models.ibm2 import IBM2
from tests.kernels.local_em import make_block, run_em
from tests.reference.test_nltk_ibm1 import TOY_CORPUS, encode, t_as_words


@pytest.mark.parametrize("n_iter", [1, 3])
def test_matches_nltk_ibm_model_2(n_iter):
    bitext = [AlignedSent(tgt, src) for src, tgt in TOY_CORPUS]
    nltk_model = IBMModel2(bitext, n_iter)

    pairs, src_words, tgt_words = encode(TOY_CORPUS)
    block = make_block(pairs)
    model = IBM2(max_length_cap=6)
    assert max(max(len(s), len(g)) for s, g in pairs) <= model.cap
    stage1 = run_em(IBM1(), block, 2 * n_iter)
    stage2 = run_em(model, block, n_iter, t=stage1.t, previous={})

    ours = t_as_words(block, stage2.t, src_words, tgt_words)
    for (s, g), p in ours.items():
        assert p == pytest.approx(nltk_model.translation_table[g][s], abs=1e-6), (s, g)

    table = stage2.dense["align_table"]
    offsets, _ = ibm2.table_offsets(model.cap)
    n_checked = 0
    for l, m in {(len(s), len(g)) for s, g in pairs}:
        for j in range(1, m + 1):
            for i in range(l + 1):
                ours_a = table[offsets[l, m] + (j - 1) * (l + 1) + i]
                assert ours_a == pytest.approx(nltk_model.alignment_table[i][j][l][m], abs=1e-6), (i, j, l, m)
                n_checked += 1
    assert n_checked == 38  # every (i, j, l, m) of the corpus
