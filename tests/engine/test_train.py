"""End-to-end training in local mode: the main job against NLTK and against itself."""
from __future__ import annotations

import dataclasses

import json
import os

import numpy as np
import pyarrow as pa
import pytest

from spark_align.config import CorpusConfig
from spark_align.engine.run import train
from spark_align.store import RunStore
from tests.engine.helpers import (TOY_SOURCE, TOY_TARGET, config, manifest, read_output, read_table,
                                  write_text)

pytestmark = pytest.mark.spark


def vocab_words(run_dir, side):
    import pyarrow.parquet as pq

    t = pq.read_table(os.path.join(run_dir, "vocab", side))
    return {i: w for w, i in zip(t.column("word").to_pylist(), t.column("id").to_pylist())}


def test_model1_matches_nltk_ibm1(spark, tmp_path):
    """The Spark job's t(target | source) equals nltk.translate.IBMModel1 after 4 iterations (to 1e-9)."""
    from nltk.translate import AlignedSent, IBMModel1

    src = TOY_SOURCE + ["ein buch ist klein", "das buch ist gross"]
    tgt = TOY_TARGET + ["a book is small", "the book is big"]
    s, t = write_text(tmp_path, src, tgt)
    run_dir = str(tmp_path / "run")
    train(spark, config(CorpusConfig(source_text=s, target_text=t), "ibm1:4", directions="forward"), run_dir,
          log=lambda _: None)

    nltk_model = IBMModel1([AlignedSent(b.split(), a.split()) for a, b in zip(src, tgt)], 4)
    table = read_table(run_dir, "00-ibm1", 4).to_pydict()
    sw, tw = vocab_words(run_dir, "source"), vocab_words(run_dir, "target")
    compared = 0
    for d, si, ti, p in zip(table["dir"], table["src"], table["tgt"], table["prob"]):
        assert d == 0
        expected = nltk_model.translation_table[tw[ti]][None if si == 0 else sw[si]]
        assert p == pytest.approx(expected, rel=1e-9, abs=1e-15)
        compared += 1
    # every co-occurring (source incl. NULL, target) pair is in the table, and only those
    n_cooc = len({(a, b) for x, y in zip(src, tgt) for a in [None, *x.split()] for b in y.split()})
    assert compared == n_cooc


def test_output_keeps_every_row_and_links_are_in_range(spark, tmp_path):
    src = TOY_SOURCE * 3 + ["", "x " * 150, "a b c d e f g h i j", "solo"]
    tgt = TOY_TARGET * 3 + ["nothing here", "y", "a", "   "]
    s, t = write_text(tmp_path, src, tgt)
    run_dir = str(tmp_path / "run")
    lines = []
    train(spark, config(CorpusConfig(source_text=s, target_text=t, max_ratio=5), "ibm1:2", directions="forward"),
          run_dir, log=lines.append)
    out = read_output(run_dir)
    assert out.num_rows == len(src)
    assert out.column("line").to_pylist() == list(range(1, len(src) + 1))
    assert out.column("source").to_pylist() == src
    reasons = out.column("skip_reason").to_pylist()
    assert reasons[-4:] == ["empty_source", "too_long", "length_ratio", "empty_target"]
    assert all(r is None for r in reasons[:-4])
    for row in out.to_pylist():
        if row["skip_reason"] is not None:
            assert row["alignment"] is None
            continue
        l, m = len(row["source"].split()), len(row["target"].split())
        for link in row["alignment"]:
            assert 0 <= link["source"] < l and 0 <= link["target"] < m
            assert 0.0 < link["posterior"] <= 1.0
        # forward Viterbi: at most one link per target word
        targets = [link["target"] for link in row["alignment"]]
        assert len(targets) == len(set(targets))
    summary = json.load(open(os.path.join(run_dir, "output.json")))
    assert summary["rows"] == len(src) and summary["skipped"] == 4
    assert any("skipped: empty_source 1, empty_target 1, length_ratio 1, too_long 1" in x for x in lines)


def test_progress_lines_manifests_and_loglik_never_decreases(spark, tmp_path):
    s, t = write_text(tmp_path, TOY_SOURCE * 4, TOY_TARGET * 4)
    run_dir = str(tmp_path / "run")
    lines = []
    train(spark, config(CorpusConfig(source_text=s, target_text=t), "ibm1:5"), run_dir, log=lines.append)
    progress = [x for x in lines if x.startswith("[stage")]
    assert len(progress) == 5
    assert "loglik/word" in progress[0] and "ppl" in progress[0] and "4 iteration(s) left" in progress[0]
    logliks = []
    for it in range(1, 6):
        m = manifest(run_dir, "00-ibm1", it)
        assert m["iteration"] == it and m["stage"] == "ibm1"
        assert m["corpus_fingerprint"].startswith("text-sha256:")
        assert m["config"]["stages"][0] == {"model": "ibm1", "n_iter": 5, "options": {}}
        # the reducers' checksums of what they wrote are those of the files as stored
        rel = RunStore.checkpoint_dir(0, "ibm1", it)
        assert m["table"]["crc32"] == RunStore(run_dir).checksums(rel, "lex") and len(m["table"]["crc32"]) >= 1
        logliks.append(m["metrics"]["forward"]["loglik"])
        assert m["metrics"]["forward"]["perplexity"] == pytest.approx(
            np.exp(-m["metrics"]["forward"]["loglik_per_word"]))
    assert all(b >= a - 1e-9 for a, b in zip(logliks, logliks[1:])), logliks


def test_resume_gives_the_same_tables_as_an_uninterrupted_run(spark, tmp_path):
    s, t = write_text(tmp_path, TOY_SOURCE * 3, TOY_TARGET * 3)
    corpus = CorpusConfig(source_text=s, target_text=t)
    straight, resumed = str(tmp_path / "straight"), str(tmp_path / "resumed")
    train(spark, config(corpus, "ibm1:4", directions="both"), straight, log=lambda _: None)
    train(spark, config(corpus, "ibm1:2", directions="both"), resumed, log=lambda _: None)
    lines = []
    train(spark, config(corpus, "ibm1:4", directions="both"), resumed, resume=True, log=lines.append)
    assert any("resuming after checkpoint ibm1:2" in x for x in lines)
    assert sum(x.startswith("[stage") for x in lines) == 2
    assert read_table(straight, "00-ibm1", 4).equals(read_table(resumed, "00-ibm1", 4))
    a, b = read_output(straight), read_output(resumed)
    assert a.column("alignment").equals(b.column("alignment"))


def test_stored_lookup_hints_are_checked_and_never_change_results(spark, tmp_path):
    from spark_align.kernels import lookup

    s, t = write_text(tmp_path, TOY_SOURCE * 3, TOY_TARGET * 3)
    corpus = CorpusConfig(source_text=s, target_text=t)
    straight, resumed = str(tmp_path / "straight"), str(tmp_path / "resumed")
    train(spark, config(corpus, "ibm1:4", directions="both"), straight, log=lambda _: None)

    def shares(run_dir, iteration):
        m = manifest(run_dir, "00-ibm1", iteration)["metrics"]
        assert all(m[d]["lookup_keys"] > 0 for d in ("forward", "reverse"))
        return {d: (m[d]["lookup_keys_searched"] / m[d]["lookup_keys"], m[d]["lookup_keys_trusted"] / m[d]["lookup_keys"])
                for d in ("forward", "reverse")}

    # Iteration 1 has the constant table; 2 searches every key and stores the hints with the table's keys
    # id; 3 and 4 have the same keys, so they take the stored positions as they are (no search, no check).
    assert shares(straight, 2) == {"forward": (1.0, 0.0), "reverse": (1.0, 0.0)}
    assert shares(straight, 3) == shares(straight, 4) == {"forward": (0.0, 1.0), "reverse": (0.0, 1.0)}

    train(spark, config(corpus, "ibm1:2", directions="both"), resumed, log=lambda _: None)
    hints_dir = os.path.join(resumed, "encoded", "hints")
    (fwd,), (rev,) = (sorted(os.listdir(os.path.join(hints_dir, d))) for d in ("forward", "reverse"))
    with open(os.path.join(hints_dir, "forward", fwd), "rb+") as fh:
        data = bytearray(fh.read())
        data[len(data) // 2] ^= 1                                # damaged: the CRC-32 refuses it, searched afresh
        fh.seek(0)
        fh.write(bytes(data))
    with open(os.path.join(hints_dir, "reverse", rev), "rb+") as fh:
        stored = lookup.decode_hints(fh.read())
        points = stored.points.copy()
        points[::2] += 1                                         # half of them wrong, not marked exact:
        fh.seek(0)                                               # checked, so the wrong half is found out
        fh.write(lookup.encode_hints(lookup.StoredHints(points, stored.found, stored.keys_id, exact=False)))
        fh.truncate()
    train(spark, config(corpus, "ibm1:4", directions="both"), resumed, resume=True, log=lambda _: None)
    assert read_table(straight, "00-ibm1", 4).equals(read_table(resumed, "00-ibm1", 4))
    third = shares(resumed, 3)
    assert third["forward"] == (1.0, 0.0)
    assert third["reverse"][0] == pytest.approx(0.5, abs=0.01) and third["reverse"][1] == 0.0
    assert shares(resumed, 4) == {"forward": (0.0, 1.0), "reverse": (0.0, 1.0)}  # stored again by iteration 3
    a, b = read_output(straight), read_output(resumed)
    assert a.column("alignment").equals(b.column("alignment"))

    # The output pass's decoder gives the same rows with right, wrong or no hints.
    import fsspec

    from spark_align.engine import hints, mstep, output, tables
    from spark_align.models.ibm1 import IBM1
    from spark_align.store import RunStore

    store = RunStore(straight)
    (path, row_group), = mstep.block_units(store)
    lex = os.path.join(straight, "checkpoints", "00-ibm1", "iter-0004", "lex")
    n_src, n_tgt = (len(vocab_words(straight, side)) + 1 for side in ("source", "target"))
    source = tables.table_source(lex, ("forward", "reverse"), n_src, n_tgt)
    model = IBM1()
    decode = output.make_decoder(model, ("forward", "reverse"), source, {d: model.init_dense(None) for d in
                                 ("forward", "reverse")}, method="viterbi", threshold=0.5,
                                 symmetrization="grow-diag-final-and")
    fs = fsspec.filesystem("file")
    right = {d: hints.read(fs, os.path.join(straight, "encoded", "hints"), d, path, row_group)
             for d in ("forward", "reverse")}
    assert all(h is not None for h in right.values())
    wrong = {d: dataclasses.replace(h, points=h.points[::-1].copy()) for d, h in right.items()}
    runs = [pa.Table.from_batches(list(decode(mstep.read_unit(fs, path, row_group), h)))
            for h in (None, right, wrong)]
    assert runs[0].num_rows > 0 and runs[0].equals(runs[1]) and runs[0].equals(runs[2])
    # A row group decoded with its stored positions taken as they are (neither the dictionary keys read
    # nor each key checked), with wrong ones marked exact (found out, then searched), and without.
    from spark_align.engine.estep import hints_exact_for

    assert all(hints_exact_for(right[d], source.value[d]) for d in right)
    wrong_exact = {d: dataclasses.replace(h, exact=True) for d, h in wrong.items()}
    for h in (right, wrong_exact, {}):
        got = pa.Table.from_batches(list(decode.unit(fs, path, row_group, h)))
        assert got.equals(runs[0])


def test_parquet_corpus_with_id_and_renamed_columns(spark, tmp_path):
    import pyarrow.parquet as pq

    table = pa.table({"doc": [f"d{i}" for i in range(15)], "de": TOY_SOURCE * 3, "en": TOY_TARGET * 3,
                      "extra": list(range(15))})
    pq.write_table(table, tmp_path / "c.parquet")
    run_dir = str(tmp_path / "run")
    train(spark, config(CorpusConfig(path=str(tmp_path / "c.parquet"), source_column="de", target_column="en",
                                     id_column="doc"), "ibm1:2"), run_dir, log=lambda _: None)
    out = read_output(run_dir)
    assert out.column("doc").to_pylist() == table.column("doc").to_pylist()
    assert out.column("extra").to_pylist() == list(range(15))
    assert out.column("alignment").null_count == 0


def test_random_init_is_seeded(spark, tmp_path):
    s, t = write_text(tmp_path, TOY_SOURCE * 2, TOY_TARGET * 2)
    corpus = CorpusConfig(source_text=s, target_text=t)
    runs = []
    for name, seed in (("a", 3), ("b", 3), ("c", 4)):
        run_dir = str(tmp_path / name)
        train(spark, config(corpus, "ibm1:1", init="random", seed=seed), run_dir, log=lambda _: None)
        runs.append(read_table(run_dir, "00-ibm1", 0))
    assert runs[0].equals(runs[1])
    assert not runs[0].equals(runs[2])
    # The random table is Spark's, not in the reducers' buckets: the join path sends it to its lookups
    # by bucket first, and the iteration from it is the broadcast path's, bit for bit.
    joined = str(tmp_path / "a-join")
    train(spark, config(corpus, "ibm1:1", init="random", seed=3, shipping="join"), joined, log=lambda _: None)
    assert read_table(joined, "00-ibm1", 1).equals(read_table(str(tmp_path / "a"), "00-ibm1", 1))
    assert manifest(joined, "00-ibm1", 1)["metrics"]["forward"]["shipping"] == "join"
    probs = runs[0].to_pydict()
    totals = {}
    for d, s_id, t_id, p in zip(probs["dir"], probs["src"], probs["tgt"], probs["prob"]):
        key = (d, s_id if d == 0 else t_id)  # normalised per conditioning word of each direction
        totals[key] = totals.get(key, 0.0) + p
    assert {d for d, _ in totals} == {0, 1}
    assert all(v == pytest.approx(1.0) for v in totals.values())
