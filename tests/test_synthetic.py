"""Tests of the generated corpus (spark_align.corpus.synthetic)."""
from __future__ import annotations

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from spark_align.corpus import synthetic as syn
from spark_align.errors import ConfigError, SparkAlignError

SMALL = dict(src_vocab=300, tgt_vocab=300, min_len=4, max_len=15)


def _tokens(table: pa.Table, column: str) -> list[list[str]]:
    return [line.split() for line in table.column(column).to_pylist()]


def _links(table: pa.Table) -> list[list[tuple[int, int]]]:
    return [[(link["source"], link["target"]) for link in row] for row in table.column("alignment").to_pylist()]


@pytest.fixture(scope="module")
def corpus() -> pa.Table:
    return syn.generate(2000, seed=11, **SMALL)


# --------------------------------------------------------------------------
# Determinism and shape
# --------------------------------------------------------------------------

def test_same_seed_gives_identical_table():
    first = syn.generate(500, seed=4, **SMALL)
    second = syn.generate(500, seed=4, **SMALL)
    assert first.equals(second, check_metadata=True)


def test_different_seeds_differ():
    first = syn.generate(200, seed=1, **SMALL)
    second = syn.generate(200, seed=2, **SMALL)
    same = sum(a == b for a, b in zip(first.column("source").to_pylist(), second.column("source").to_pylist()))
    assert same < 5


def test_schema_sizes_and_ids(corpus):
    assert corpus.schema.remove_metadata().equals(syn.SCHEMA)
    assert corpus.num_rows == 2000
    assert corpus.column("id").to_pylist() == list(range(2000))
    src_len = np.array([len(t) for t in _tokens(corpus, "source")])
    tgt_len = np.array([len(t) for t in _tokens(corpus, "target")])
    assert src_len.min() >= 4 and src_len.max() <= 15
    assert set(src_len) == set(range(4, 16))  # every length occurs in 2000 draws
    assert tgt_len.min() >= 1
    assert syn.generate(0, seed=0, **SMALL).num_rows == 0


def test_chunks_keep_ids_and_determinism(monkeypatch):
    monkeypatch.setattr(syn, "_CHUNK_PAIRS", 64)
    table = syn.generate(200, seed=9, **SMALL)
    assert table.column("id").to_pylist() == list(range(200))
    assert table.equals(syn.generate(200, seed=9, **SMALL))
    for src, tgt, links in zip(_tokens(table, "source"), _tokens(table, "target"), _links(table)):
        assert all(i < len(src) and j < len(tgt) for i, j in links)


def test_metadata_records_seed_and_settings(corpus):
    import json
    meta = json.loads(corpus.schema.metadata[syn.METADATA_KEY])
    assert meta["seed"] == 11
    assert meta["config"]["src_vocab"] == 300 and meta["config"]["max_len"] == 15


# --------------------------------------------------------------------------
# Gold links
# --------------------------------------------------------------------------

def test_links_in_bounds_and_at_most_one_per_target_word(corpus):
    for src, tgt, links in zip(_tokens(corpus, "source"), _tokens(corpus, "target"), _links(corpus)):
        assert all(0 <= i < len(src) and 0 <= j < len(tgt) for i, j in links)
        tgt_side = [j for _, j in links]
        assert len(tgt_side) == len(set(tgt_side))
        assert tgt_side == sorted(tgt_side)  # documented: links come in target order


def test_links_follow_the_lexicon_and_unlinked_words_are_function_words(corpus):
    """Every link joins a source word to one of its translations or its companion;
    every target word without a link is an inserted function word, and vice versa."""
    lex = syn._build_lexicon(syn.SyntheticConfig(**SMALL), syn._streams(11)[0])
    src_index = {w: k for k, w in enumerate(syn.source_vocabulary(300))}
    tgt_index = {w: k for k, w in enumerate(syn.target_vocabulary(300))}
    function_words = {w for w, _ in syn.FUNCTION_WORDS}
    for src, tgt, links in zip(_tokens(corpus, "source"), _tokens(corpus, "target"), _links(corpus)):
        for i, j in links:
            s = src_index[src[i]]
            allowed = set(lex.trans_ids[s][lex.trans_prob[s] > 0]) | {lex.companion[s]}
            assert tgt_index[tgt[j]] in allowed
        linked = {j for _, j in links}
        for j, word in enumerate(tgt):
            assert (j not in linked) == (word in function_words)


def test_reordering_is_local(corpus):
    dist, shift = [], []
    for src, tgt, links in zip(_tokens(corpus, "source"), _tokens(corpus, "target"), _links(corpus)):
        dist += [abs(i / len(src) - j / len(tgt)) for i, j in links]
        # Rank order of linked source positions vs their place in the target:
        # moves are at most 2 words, so a source word lands within a few ranks.
        order = sorted(range(len(links)), key=lambda k: links[k][0])
        shift += [abs(rank - k) for rank, k in enumerate(order)]
    assert np.mean(dist) < 0.085
    assert np.mean(shift) < 0.7 and max(shift) <= 6


def test_no_noise_gives_a_monotone_one_to_one_corpus():
    table = syn.generate(300, seed=3, reorder=0.0, insert_rate=0.0, p_delete=0.0, particle_delete=0.0,
                         double_rate=0.0, **SMALL)
    # Only the glossary keeps its own fertility ('ka' may vanish, 'buno' may emit
    # two words); every other word is translated one-to-one, in order.
    seen_ka_deleted = seen_buno_double = False
    for src, tgt, links in zip(_tokens(table, "source"), _tokens(table, "target"), _links(table)):
        assert [j for _, j in links] == list(range(len(tgt)))
        assert [i for i, _ in links] == sorted(i for i, _ in links)
        n_links = np.bincount([i for i, _ in links], minlength=len(src))
        for i, word in enumerate(src):
            expected = {"ka": {0, 1}, "buno": {1, 2}}.get(word, {1})
            assert n_links[i] in expected
            seen_ka_deleted |= word == "ka" and n_links[i] == 0
            seen_buno_double |= word == "buno" and n_links[i] == 2
    assert seen_ka_deleted and seen_buno_double


def test_phenomena_happen_at_their_rates():
    table = syn.generate(4000, seed=5, **SMALL)
    n_ka = n_ka_deleted = n_buno = n_buno_double = n_src = n_inserted = 0
    for src, tgt, links in zip(_tokens(table, "source"), _tokens(table, "target"), _links(table)):
        by_src = {}
        for i, j in links:
            by_src.setdefault(i, []).append(j)
        for i, word in enumerate(src):
            if word == "ka":
                n_ka += 1
                n_ka_deleted += i not in by_src
            if word == "buno":
                n_buno += 1
                n_buno_double += len(by_src.get(i, [])) == 2
        n_src += len(src)
        n_inserted += len(tgt) - len(links)
    # Glossary settings: 'ka' deleted with p=0.5, 'buno' doubled with p=0.5;
    # insertions are Binomial(l, 0.08) per pair. Tolerances are ~5 standard errors.
    assert abs(n_ka_deleted / n_ka - 0.5) < 0.03
    assert abs(n_buno_double / n_buno - 0.5) < 0.05
    assert abs(n_inserted / n_src - 0.08) < 0.01


def test_zipf_frequencies():
    table = syn.generate(5000, seed=8, src_vocab=2000, tgt_vocab=2000)
    counts = {}
    for sentence in _tokens(table, "source"):
        for word in sentence:
            counts[word] = counts.get(word, 0) + 1
    values = np.array(sorted(counts.values(), reverse=True), dtype=float)
    assert values[0] > 50 * np.median(values)
    assert max(counts, key=counts.get) == "ka"  # rank 0
    # Slope of log frequency against log rank over the well-sampled ranks
    # should be close to -zipf_a = -1.
    ranks = np.arange(1, 201)
    slope = np.polyfit(np.log(ranks), np.log(values[:200]), 1)[0]
    assert -1.15 < slope < -0.85


# --------------------------------------------------------------------------
# Vocabulary and glossary
# --------------------------------------------------------------------------

def test_vocabularies_are_distinct_and_fixed():
    src = syn.source_vocabulary(5000)
    tgt = syn.target_vocabulary(5000)
    assert len(set(src)) == 5000 and len(set(tgt)) == 5000
    assert src[: len(syn.GLOSSARY)] == tuple(entry[0] for entry in syn.GLOSSARY)
    assert syn.source_vocabulary(100) == src[:100]  # spelling of id k does not depend on size
    assert all(" " not in w and w for w in src + tgt)


def test_glossary_translations_are_reversed_spellings():
    lexicon = syn.true_lexicon(seed=0, **SMALL).to_pylist()
    for word, translations, *_ in syn.GLOSSARY:
        rows = {(r["target"], round(r["prob"], 6)) for r in lexicon if r["source"] == word}
        assert rows == {(t, p) for t, p in translations}
        assert translations[0][0] == word[::-1]


def test_true_lexicon_rows_sum_to_one():
    lexicon = syn.true_lexicon(seed=2, **SMALL).to_pandas()
    sums = lexicon.groupby("source")["prob"].sum()
    assert len(sums) == 300
    np.testing.assert_allclose(sums.to_numpy(), 1.0)


def test_demo_corpus_features_the_glossary():
    table = syn.demo_corpus()
    assert table.num_rows == 3000
    counts = {}
    for sentence in _tokens(table, "source"):
        for word in sentence:
            counts[word] = counts.get(word, 0) + 1
    assert all(counts.get(entry[0], 0) >= 100 for entry in syn.GLOSSARY)


# --------------------------------------------------------------------------
# Settings are checked
# --------------------------------------------------------------------------

@pytest.mark.parametrize("settings, fragment", [
    (dict(min_len=0), "min_len"),
    (dict(min_len=10, max_len=5), "min_len"),
    (dict(reorder=1.5), "reorder"),
    (dict(src_vocab=5), "src_vocab"),
    (dict(tgt_vocab=10), "tgt_vocab"),
    (dict(particle_delete=0.8, double_rate=0.5), "double_rate"),
])
def test_bad_settings_are_named(settings, fragment):
    with pytest.raises(ConfigError, match=fragment):
        syn.generate(10, **settings)


def test_bad_counts_and_unknown_settings():
    with pytest.raises(ValueError, match="n_pairs"):
        syn.generate(-1)
    with pytest.raises(ValueError, match="seed"):
        syn.generate(1, seed=-3)
    with pytest.raises(TypeError):
        syn.generate(1, no_such_setting=1)


# --------------------------------------------------------------------------
# Writers
# --------------------------------------------------------------------------

def test_write_parquet_round_trip_and_no_silent_overwrite(tmp_path, corpus):
    paths = syn.write_parquet(corpus, str(tmp_path / "pq"), n_files=3)
    assert [p.rsplit("/", 1)[1] for p in paths] == ["part-00000.parquet", "part-00001.parquet", "part-00002.parquet"]
    back = pa.concat_tables([pq.read_table(p) for p in paths])
    assert back.equals(corpus)
    with pytest.raises(syn.OutputExistsError, match="part-00000"):
        syn.write_parquet(corpus, str(tmp_path / "pq"))
    assert pq.read_table(paths[2]).num_rows > 0  # nothing lost by the refused call
    syn.write_parquet(corpus.slice(0, 10), str(tmp_path / "pq"), overwrite=True)
    assert sorted(p.name for p in (tmp_path / "pq").iterdir()) == ["part-00000.parquet"]


def test_write_text_lines_and_links(tmp_path, corpus):
    src, tgt, links = (str(tmp_path / name) for name in ("c.src", "c.tgt", "c.links"))
    syn.write_text(corpus, src, tgt, links)
    src_lines = open(src, encoding="utf-8").read().split("\n")[:-1]
    link_lines = open(links, encoding="utf-8").read().split("\n")[:-1]
    assert src_lines == corpus.column("source").to_pylist()
    assert len(open(tgt, encoding="utf-8").read().split("\n")) - 1 == corpus.num_rows
    parsed = [[tuple(map(int, item.split("-"))) for item in line.split()] for line in link_lines]
    assert parsed == _links(corpus)


def test_write_text_needs_alignment_for_links(tmp_path):
    table = pa.table({"source": ["a b"], "target": ["c"]})
    with pytest.raises(SparkAlignError, match="alignment"):
        syn.write_text(table, str(tmp_path / "s"), str(tmp_path / "t"), str(tmp_path / "l"))
    assert list(tmp_path.iterdir()) == []


# --------------------------------------------------------------------------
# Outside reference: NLTK's IBM models (nltk.translate) and its AER
# --------------------------------------------------------------------------

def test_nltk_ibm_models_learn_it_and_ibm2_beats_ibm1():
    """The corpus is learnable by a reference implementation of IBM Model 1,
    and the position-aware IBM Model 2 aligns it measurably better."""
    from nltk.translate import AlignedSent, Alignment, IBMModel1, IBMModel2
    from nltk.translate.metrics import alignment_error_rate

    table = syn.generate(400, seed=3, src_vocab=150, tgt_vocab=150, min_len=4, max_len=12)
    rows = table.to_pylist()
    # NLTK's AlignedSent(words, mots) models p(words | mots); its alignments are (word j, mot i).
    gold = Alignment([(k, link["target"], link["source"]) for k, r in enumerate(rows) for link in r["alignment"]])

    def corpus_aer(model_cls):
        bitext = [AlignedSent(r["target"].split(), r["source"].split()) for r in rows]
        model = model_cls(bitext, 5)
        hyp = Alignment([(k, j, i) for k, s in enumerate(bitext) for j, i in s.alignment if i is not None])
        return model, alignment_error_rate(gold, hyp)

    ibm1, aer1 = corpus_aer(IBMModel1)
    _, aer2 = corpus_aer(IBMModel2)
    table_t = ibm1.translation_table
    for word, translations, *_ in syn.GLOSSARY[1:6]:
        best = max(table_t, key=lambda f: table_t[f][word])
        assert best == translations[0][0]
    assert aer1 < 0.25
    assert aer2 < 0.8 * aer1
