"""A downstream check: NLTK's phrase extraction reads our links text and respects it.

Reference: ``nltk.translate.phrase_based.phrase_extraction`` (NLTK, from the
package registry) extracts every phrase pair consistent with a word alignment.
We feed it our exported links text and the tokens of the training corpus; every
phrase pair it returns must be consistent with our links (no link leaves the
pair's box, at least one link inside), and every one-to-one link must come back
as a one-word phrase pair.
"""
from __future__ import annotations

from collections import Counter

import pytest

from spark_align import export
from tests.engine.test_export import trained_run

pytestmark = pytest.mark.spark

N_PAIRS = 30


def consistent(links, src_span, tgt_span) -> bool:
    (s0, s1), (t0, t1) = src_span, tgt_span
    inside = [(i, j) for i, j in links if s0 <= i < s1 and t0 <= j < t1]
    leaving = [(i, j) for i, j in links if (s0 <= i < s1) != (t0 <= j < t1)]
    return bool(inside) and not leaving


def test_nltk_phrase_extraction_respects_our_links(spark, tmp_path_factory, tmp_path):
    from nltk.translate.phrase_based import phrase_extraction

    run = trained_run(spark, tmp_path_factory.getbasetemp() / "shared-export-run")
    links_path = tmp_path / "links.txt"
    export.export_links(spark, run["run"], str(links_path), log=lambda _: None)
    lines = links_path.read_text(encoding="utf-8").split("\n")[:-1]
    assert len(lines) == len(run["source"])
    checked = 0
    for src, tgt, line in zip(run["source"], run["target"], lines):
        if not line:
            continue
        links = [tuple(int(v) for v in item.split("-")) for item in line.split()]
        assert all(0 <= i < len(src.split()) and 0 <= j < len(tgt.split()) for i, j in links)
        # No length limit: NLTK 3.10.4 cuts a target span longer than max_phrase_length short instead of
        # dropping the pair (seen here: it returned ((0, 4), (0, 4)) with link 3-4 leaving the box), which
        # would make this check about NLTK rather than about our links.
        phrases = phrase_extraction(src, tgt, links, max_phrase_length=max(len(src.split()), len(tgt.split())))
        assert phrases
        for src_span, tgt_span, src_phrase, tgt_phrase in phrases:
            assert consistent(links, src_span, tgt_span), (line, src_span, tgt_span)
            assert src_phrase == " ".join(src.split()[src_span[0]:src_span[1]])
            assert tgt_phrase == " ".join(tgt.split()[tgt_span[0]:tgt_span[1]])
        # a one-to-one link is itself a consistent phrase pair, so it must be among them
        spans = {(a, b) for a, b, _, _ in phrases}
        n_src_links, n_tgt_links = Counter(i for i, _ in links), Counter(j for _, j in links)
        for i, j in links:
            if n_src_links[i] == 1 and n_tgt_links[j] == 1:
                assert ((i, i + 1), (j, j + 1)) in spans, (line, i, j)
        checked += 1
        if checked == N_PAIRS:
            break
    assert checked == N_PAIRS
