"""AER, precision, recall and F1 against NLTK.

NLTK conventions (read from its source):
* ``nltk.translate.metrics.alignment_error_rate(reference, hypothesis, possible)``
  takes ``Alignment`` objects: reference = sure links S, hypothesis = A,
  possible = P, which it requires to contain S (it asserts S ⊆ P; we pass P ∪ S).
  It computes 1 - (|A∩S| + |A∩P|) / (|A| + |S|) and divides by zero when A and S
  are both empty, so those cases are compared only with ours returning NaN.
* ``nltk.metrics.scores.precision(reference, test)`` = |reference ∩ test| / |test|
  and ``recall(reference, test)`` = |reference ∩ test| / |reference|, ``None`` on
  an empty denominator: our precision is ``precision(P, A)`` and our recall is
  ``recall(S, A)``. ``f_measure`` uses one reference set for both, so F1 is
  compared on cases with P = S.
"""
import math
import random

import pytest

nltk_translate = pytest.importorskip("nltk.translate")
from nltk.metrics.scores import f_measure, precision, recall  # noqa: E402
from nltk.translate import Alignment  # noqa: E402
from nltk.translate.metrics import alignment_error_rate  # noqa: E402

from spark_align.evaluate import GoldAlignment, evaluate, metrics_from_counts, sentence_counts  # noqa: E402


def random_case(rng, with_possible=True):
    n_src, n_tgt = rng.randint(1, 8), rng.randint(1, 8)
    cells = [(i, j) for i in range(n_src) for j in range(n_tgt)]
    sure = {c for c in cells if rng.random() < 0.2}
    possible_only = {c for c in cells if c not in sure and rng.random() < 0.15} if with_possible else set()
    pred = {c for c in cells if rng.random() < 0.25}
    return pred, GoldAlignment(frozenset(sure), frozenset(possible_only))


def as_none(value):
    return None if math.isnan(value) else value


def test_sentence_metrics_match_nltk():
    rng = random.Random(31)
    n_compared_aer = 0
    for _ in range(2000):
        pred, gold = random_case(rng)
        ours = metrics_from_counts(sentence_counts(pred, gold))
        assert as_none(ours["precision"]) == pytest.approx(precision(set(gold.possible), pred))
        assert as_none(ours["recall"]) == pytest.approx(recall(set(gold.sure), pred))
        if pred or gold.sure:
            expected = alignment_error_rate(Alignment(gold.sure), Alignment(pred), Alignment(gold.possible))
            assert ours["aer"] == pytest.approx(expected)
            n_compared_aer += 1
        else:
            assert math.isnan(ours["aer"])
    assert n_compared_aer > 1900


def test_f1_matches_nltk_when_possible_equals_sure():
    rng = random.Random(32)
    for _ in range(1000):
        pred, gold = random_case(rng, with_possible=False)
        ours = metrics_from_counts(sentence_counts(pred, gold))["f1"]
        expected = f_measure(set(gold.sure), pred)
        if expected is None:
            assert math.isnan(ours)
        else:
            assert ours == pytest.approx(expected)


def test_nltk_docstring_example():
    # NLTK's AER docstring: S = {0-0, 1-1, 2-2}, A = {0-0, 1-2, 2-1}, P = S -> 2/3.
    ref, hyp = {(0, 0), (1, 1), (2, 2)}, {(0, 0), (1, 2), (2, 1)}
    ours = metrics_from_counts(sentence_counts(hyp, GoldAlignment(frozenset(ref), frozenset())))
    assert ours["aer"] == pytest.approx(alignment_error_rate(Alignment(ref), Alignment(hyp)))
    assert ours["aer"] == pytest.approx(2 / 3)


def test_corpus_metrics_equal_nltk_on_the_pooled_links():
    # Micro-averaging equals scoring one big alignment whose links are tagged with
    # their sentence number, (sentence, i, j); NLTK's Alignment accepts such tuples.
    rng = random.Random(33)
    for _ in range(100):
        pred, gold = {}, {}
        for k in range(rng.randint(1, 30)):
            pred[k], gold[k] = random_case(rng)
        pooled_pred = {(k, *link) for k, links in pred.items() for link in links}
        pooled_sure = {(k, *link) for k, g in gold.items() for link in g.sure}
        pooled_possible = {(k, *link) for k, g in gold.items() for link in g.possible}
        overall = evaluate(pred, gold)["overall"]
        if pooled_pred or pooled_sure:
            assert overall["aer"] == pytest.approx(alignment_error_rate(
                Alignment(pooled_sure), Alignment(pooled_pred), Alignment(pooled_possible)))
        assert as_none(overall["precision"]) == pytest.approx(precision(pooled_possible, pooled_pred))
        assert as_none(overall["recall"]) == pytest.approx(recall(pooled_sure, pooled_pred))
