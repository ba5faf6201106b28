"""IBM Model 1 EM over blocks against outside references.

1. NLTK's ``nltk.translate.IBMModel1`` (reference library from the package
   registry), conventions matched by reading its source: translation
   direction ``mots`` (our cond/source side) -> ``words`` (our gen/target side);
   uniform start 1 / len(trg_vocab), which holds no NULL; after every M-step
   ``max(count / total, MIN_PROB = 1e-12)``. NLTK normalises a word's link
   scores by a total keyed by the *word*, so a target word repeated within one
   sentence gets half its expected count there; the corpus below repeats no
   target word inside a sentence, where that shortcut is exact EM.
2. The worked Model 1 EM example of Koehn, "Statistical Machine Translation"
   (Cambridge University Press, 2010), chapter 4: three sentence pairs, no NULL
   word, uniform start 0.25. The table values below are quoted from memory;
   iterations 1 and 2 were also re-derived by hand (e.g. t(the|das) after
   iteration 2 = (1/2 + 2/3) / (11/6) = 7/11).
"""
from __future__ import annotations

import numpy as np
import pytest
from nltk.translate import AlignedSent, IBMModel1

from spark_align.kernels import ragged
from spark_align.models.ibm1 import IBM1
from tests.kernels.local_em import make_block, run_em

# Invented toy language pair: a harbour scene (source) and a made-up target language.
TOY_CORPUS = [
    ("the red boat sails".split(), "ka boti rosa velan".split()),
    ("the boat sleeps".split(), "ka boti dormen".split()),
    ("a red sail".split(), "un vela rosa".split()),
    ("the sail sleeps".split(), "ka vela dormen".split()),
    ("a boat sails home".split(), "un boti velan kasa".split()),
    ("red home".split(), "kasa rosa".split()),
    ("the home".split(), "ka kasa".split()),
]


def encode(corpus):
    """Word ids per side from 1 (0 is NULL), plus the id -> word maps."""
    src_ids, tgt_ids = {}, {}
    pairs = []
    for src, tgt in corpus:
        pairs.append(([src_ids.setdefault(w, len(src_ids) + 1) for w in src],
                      [tgt_ids.setdefault(w, len(tgt_ids) + 1) for w in tgt]))
    return pairs, {v: k for k, v in src_ids.items()}, {v: k for k, v in tgt_ids.items()}


def t_as_words(block, t, src_words, tgt_words):
    """{(src word or None, tgt word): t} for every dictionary entry with a real gen word."""
    src, tgt = ragged.split_key(block.dict_keys)
    return {(src_words.get(int(s)), tgt_words[int(g)]): float(p) for s, g, p in zip(src, tgt, t) if g}


def test_toy_corpus_repeats_no_target_word_within_a_sentence():
    assert all(len(set(tgt)) == len(tgt) for _, tgt in TOY_CORPUS)


@pytest.mark.parametrize("n_iter", [1, 2, 5])
def test_matches_nltk_ibm_model_1(n_iter):
    bitext = [AlignedSent(tgt, src) for src, tgt in TOY_CORPUS]
    nltk_model = IBMModel1(bitext, n_iter)
    pairs, src_words, tgt_words = encode(TOY_CORPUS)
    block = make_block(pairs)
    ours = t_as_words(block, run_em(IBM1(), block, n_iter).t, src_words, tgt_words)
    assert len(ours) > 30
    for (s, g), p in ours.items():
        assert p == pytest.approx(nltk_model.translation_table[g][s], abs=1e-6), (s, g)


# Koehn (2010), ch. 4 worked example; values quoted from memory (see the module docstring).
KOEHN_PAIRS = [(["das", "Haus"], ["the", "house"]), (["das", "Buch"], ["the", "book"]),
               (["ein", "Buch"], ["a", "book"])]
KOEHN_TABLE = {  # (e, f): t(e|f) after iterations 1, 2, 3
    ("the", "das"): (0.5, 0.6364, 0.7479), ("book", "das"): (0.25, 0.1818, 0.1208),
    ("house", "das"): (0.25, 0.1818, 0.1313), ("the", "Buch"): (0.25, 0.1818, 0.1208),
    ("book", "Buch"): (0.5, 0.6364, 0.7479), ("a", "Buch"): (0.25, 0.1818, 0.1313),
    ("book", "ein"): (0.5, 0.4286, 0.3466), ("a", "ein"): (0.5, 0.5714, 0.6534),
    ("the", "Haus"): (0.5, 0.4286, 0.3466), ("house", "Haus"): (0.5, 0.5714, 0.6534),
}


@pytest.mark.parametrize("n_iter", [1, 2, 3])
def test_koehn_worked_example(n_iter):
    pairs, src_words, tgt_words = encode(KOEHN_PAIRS)
    block = make_block(pairs)
    run = run_em(IBM1(), block, n_iter, no_null=True)
    ours = t_as_words(block, run.t, src_words, tgt_words)
    for (e, f), values in KOEHN_TABLE.items():
        assert ours[(f, e)] == pytest.approx(values[n_iter - 1], abs=5e-5), (e, f)
    # The example's table lists every co-occurring pair.
    assert {k for k, v in ours.items() if k[0] is not None} == {(f, e) for e, f in KOEHN_TABLE}
