"""Aligning new data with a run's frozen tables; the pair scores of the output corpus."""
from __future__ import annotations

import json
import os

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from spark_align.config import CorpusConfig
from spark_align.engine.align import align_corpus, unknown_ids, with_unknown_words
from spark_align.engine.tables import MIN_PROB, DirectionTable
from spark_align.errors import CheckpointError, InputError, RunDirError
from spark_align.kernels import ragged
from tests.engine.test_export import N_CLEAN, demo_pairs, read_output, trained_run

pytestmark = pytest.mark.spark

N_SWAPPED = 40
OUTPUT_COLUMNS = ["alignment", "alignment_forward", "alignment_reverse", "score_forward", "score_reverse",
                  "skip_reason"]


@pytest.fixture(scope="module")
def trained(spark, tmp_path_factory):
    return trained_run(spark, tmp_path_factory.getbasetemp() / "shared-export-run")


def quiet(_):
    pass


def test_align_on_the_training_corpus_reproduces_the_run_exactly(spark, trained, tmp_path):
    out = tmp_path / "aligned"
    manifest = align_corpus(spark, trained["run"], CorpusConfig(source_text=trained["source_text"],
                                                                target_text=trained["target_text"]),
                            str(out), log=quiet)
    assert manifest["checkpoint"] == "hmm:1" and manifest["kind"] == "align"
    assert manifest["unknown_tokens"] == {"source": 0, "target": 0}
    assert sorted(os.listdir(out)) == ["align.json", "output", "output.json"]  # work folders removed
    ours, theirs = read_output(str(out)), read_output(trained["run"])
    assert ours.column_names == theirs.column_names
    assert ours.num_rows == len(trained["source"])
    for column in ["_row", "line", "source", "target", *OUTPUT_COLUMNS]:
        assert ours.column(column).equals(theirs.column(column)), column
    # the output is not replaced without --overwrite, and a run directory is never a target
    with pytest.raises(RunDirError, match="already holds aligned output"):
        align_corpus(spark, trained["run"], CorpusConfig(source_text=trained["source_text"],
                                                         target_text=trained["target_text"]), str(out), log=quiet)
    with pytest.raises(RunDirError, match="is a run directory"):
        align_corpus(spark, trained["run"], CorpusConfig(source_text=trained["source_text"],
                                                         target_text=trained["target_text"]), trained["run"],
                     log=quiet)


def _vocab(run_dir, side):
    return set(pq.read_table(os.path.join(run_dir, "vocab", side)).column("word").to_pylist())


def test_new_corpus_with_unknown_words_and_mismatched_pairs(spark, trained, tmp_path):
    """Unknown words fall back to NULL; a real pair scores higher than its source with another's target."""
    src, tgt = demo_pairs()
    new_src = src[:N_SWAPPED] + src[:N_SWAPPED] + ["ka qqzunk ruvo", "qqzunk qqwunk", "ka"]
    new_tgt = tgt[:N_SWAPPED] + [tgt[(i + 1) % N_CLEAN] for i in range(N_SWAPPED)] + ["ak qqnew ey", "qqnew", "qqnew"]
    corpus = tmp_path / "new.parquet"
    pq.write_table(pa.table({"doc": [f"n{i}" for i in range(len(new_src))], "de": new_src, "en": new_tgt}), corpus)
    out = tmp_path / "aligned"
    manifest = align_corpus(spark, trained["run"], CorpusConfig(path=str(corpus), source_column="de",
                                                                target_column="en", id_column="doc"),
                            str(out), checkpoint="ibm1:2", log=quiet)
    assert manifest["checkpoint"] == "ibm1:2"
    result = pq.read_table(out / "output").sort_by("_row").to_pydict()
    assert result["doc"] == [f"n{i}" for i in range(len(new_src))] and result["de"] == new_src

    # scores: the model's log-probability per word, higher for the real pair in both directions
    for column in ("score_forward", "score_reverse"):
        clean, swapped = np.array(result[column][:N_SWAPPED]), np.array(result[column][N_SWAPPED:2 * N_SWAPPED])
        assert (clean <= 0).all() and (swapped <= 0).all()
        assert (clean > swapped).all(), (column, np.flatnonzero(clean <= swapped))
        assert (swapped >= np.log(MIN_PROB) - 1e-9).all()  # the floor bounds a Model 1 score from below

    # unknown words: counted, never an error, and left unaligned in the direction that generates them
    src_vocab, tgt_vocab = _vocab(trained["run"], "source"), _vocab(trained["run"], "target")
    expected = {"source": sum(w not in src_vocab for s in new_src for w in s.split()),
                "target": sum(w not in tgt_vocab for t in new_tgt for w in t.split())}
    assert expected == {"source": 3, "target": 3} and manifest["unknown_tokens"] == expected
    for k in range(2 * N_SWAPPED, len(new_src)):
        s_words, t_words = new_src[k].split(), new_tgt[k].split()
        assert all(t_words[x["target"]] in tgt_vocab for x in result["alignment_forward"][k]), k
        assert all(s_words[x["source"]] in src_vocab for x in result["alignment_reverse"][k]), k
        assert result["skip_reason"][k] is None
    assert result["alignment"][2 * N_SWAPPED + 1] == []  # nothing known on either side: no links

    # The table shipped per unit to the decoding tasks (neither the driver nor any Python worker reads
    # it whole): the same output, scores included, so the unknown words' entries were there too.
    joined = tmp_path / "aligned-join"
    align_corpus(spark, trained["run"], CorpusConfig(path=str(corpus), source_column="de", target_column="en",
                                                     id_column="doc"),
                 str(joined), checkpoint="ibm1:2", shipping="join", log=quiet)
    assert pq.read_table(joined / "output").sort_by("_row").equals(pq.read_table(out / "output").sort_by("_row"))
    assert sorted(os.listdir(joined)) == ["align.json", "output", "output.json"]


def test_unknown_word_fallback_entries():
    keys = ragged.make_key(np.array([0, 1, 2]), np.array([1, 1, 2]))
    tabs = {"forward": DirectionTable(keys, np.array([0.2, 0.5, 0.9])),
            "reverse": DirectionTable(keys, np.array([0.3, 0.6, 0.7]))}
    got = with_unknown_words(tabs, src_vocab_size=2, tgt_vocab_size=4)
    src_unk, tgt_unk = unknown_ids(2, 4)
    assert (src_unk, tgt_unk) == (3, 5)
    ask = ragged.make_key(np.array([0, 1, 3, 1, 0]), np.array([5, 5, 0, 1, 1]))
    np.testing.assert_array_equal(got["forward"].local(ask), [1 / 5, MIN_PROB, MIN_PROB, 0.5, 0.2])
    np.testing.assert_array_equal(got["reverse"].local(ask), [MIN_PROB, MIN_PROB, 1 / 3, 0.6, 0.3])


def test_bad_align_requests_fail_before_writing(spark, trained, tmp_path):
    out = tmp_path / "aligned"
    with pytest.raises(InputError, match="no such file"):
        align_corpus(spark, trained["run"], CorpusConfig(source_text=str(tmp_path / "a"),
                                                         target_text=str(tmp_path / "b")), str(out), log=quiet)
    with pytest.raises(CheckpointError, match="no committed checkpoint 'hmm:9'.*ibm1:1, ibm1:2, hmm:1"):
        align_corpus(spark, trained["run"], CorpusConfig(source_text=trained["source_text"],
                                                         target_text=trained["target_text"]), str(out),
                     checkpoint="hmm:9", log=quiet)
    foreign = tmp_path / "foreign"
    foreign.mkdir()
    (foreign / "notes.txt").write_text("mine")
    with pytest.raises(RunDirError, match="not empty"):
        align_corpus(spark, trained["run"], CorpusConfig(source_text=trained["source_text"],
                                                         target_text=trained["target_text"]), str(foreign),
                     log=quiet)
    assert not out.exists() and os.listdir(foreign) == ["notes.txt"]
    assert json.load(open(os.path.join(trained["run"], "output.json")))["checkpoint"] == "hmm:1"
