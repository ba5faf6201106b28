"""Both directions end to end: symmetrization against the known alignments, ``--gold``, resume.

The corpus is generated (``spark_align.corpus.synthetic``), so every pair's true
alignment is known and serves as the gold standard.
"""
from __future__ import annotations

import json
import os

import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from spark_align import evaluate as ev
from spark_align.cli import main
from spark_align.config import CorpusConfig
from spark_align.corpus import synthetic
from spark_align.engine.run import train
from tests.engine.helpers import TOY_SOURCE, TOY_TARGET, config, manifest, read_output, read_table, write_text

pytestmark = [pytest.mark.spark, pytest.mark.slow]

N_PAIRS, N_GOLD = 800, 300


def output_links(out: pa.Table, column: str) -> dict:
    return {line: frozenset((x["source"], x["target"]) for x in links)
            for line, links in zip(out.column("line").to_pylist(), out.column(column).to_pylist()) if links is not None}


@pytest.fixture(scope="module")
def generated_run(spark, tmp_path_factory):
    """IBM Model 1 (3 iterations), both directions, on a generated corpus; --gold = the true links of the first N_GOLD lines."""
    d = tmp_path_factory.mktemp("generated")
    table = synthetic.generate(N_PAIRS, seed=3, src_vocab=300, tgt_vocab=300, min_len=4, max_len=15)
    synthetic.write_text(table, str(d / "c.src"), str(d / "c.tgt"), str(d / "all.txt"))
    gold = d / "gold.txt"
    gold.write_text("".join(line + "\n" for line in synthetic.links_text(table)[:N_GOLD]), encoding="utf-8")
    lines: list[str] = []
    run_dir = str(d / "run")
    cfg = config(CorpusConfig(source_text=str(d / "c.src"), target_text=str(d / "c.tgt")), "ibm1:3",
                 directions="both", block_size=256)
    train(spark, cfg, run_dir, gold=str(gold), log=lines.append)
    return {"dir": d, "run": run_dir, "lines": lines, "gold": str(gold), "all_gold": str(d / "all.txt")}


def test_grow_diag_final_and_beats_each_direction(generated_run):
    """On the generated corpus, the symmetrized alignment has a lower AER than either direction (Model 1).

    Figures are printed (pytest -s) for the record.
    """
    out = read_output(generated_run["run"])
    gold = ev.read_gold_text(generated_run["all_gold"])
    aer = {}
    for column in ("alignment", "alignment_forward", "alignment_reverse"):
        report = ev.evaluate(output_links(out, column), gold)
        assert report["overall"]["n_sentences"] == N_PAIRS
        aer[column] = report["overall"]["aer"]
        print(f"{column}: precision {report['overall']['precision']:.4f} recall {report['overall']['recall']:.4f} "
              f"AER {aer[column]:.4f}")
    assert aer["alignment"] < aer["alignment_forward"]
    assert aer["alignment"] < aer["alignment_reverse"]


def test_gold_metrics_in_progress_lines_and_manifests_and_improve(generated_run):
    progress = [x for x in generated_run["lines"] if x.startswith("[stage")]
    assert len(progress) == 3 and all(" gold P " in x and " AER " in x for x in progress)
    assert any(f"gold: {N_GOLD} of {N_GOLD} gold pairs found" in x for x in generated_run["lines"])
    golds = [manifest(generated_run["run"], "00-ibm1", it)["metrics"]["gold"] for it in range(1, 4)]
    for g in golds:
        assert g["n_sentences"] == N_GOLD and g["n_missing"] == 0
        assert set(g["forward"]) >= {"precision", "recall", "f1", "aer"} and "aer" in g["reverse"]
    print("gold AER per iteration:", [round(g["aer"], 4) for g in golds])
    assert golds[-1]["aer"] < golds[0]["aer"] and golds[-1]["f1"] > golds[0]["f1"]
    for d in ("forward", "reverse"):
        assert golds[-1][d]["aer"] < golds[0][d]["aer"]


def test_gold_metrics_match_the_evaluate_command_on_the_output(generated_run, capsys):
    """The per-iteration scoring (gold pairs cut out of their blocks) agrees with scoring the output."""
    last = manifest(generated_run["run"], "00-ibm1", 3)["metrics"]["gold"]
    for column, expected in (("alignment", last), ("alignment_forward", last["forward"]),
                             ("alignment_reverse", last["reverse"])):
        code = main(["evaluate", "--predicted", os.path.join(generated_run["run"], "output"),
                     "--gold", generated_run["gold"], "--alignment-column", column, "--json"])
        report = json.loads(capsys.readouterr().out)
        assert code == 0
        assert report["extra"]["count"] == N_PAIRS - N_GOLD
        for key in ("precision", "recall", "aer", "n_predicted"):
            assert report["overall"][key] == pytest.approx(expected[key], abs=1e-12), (column, key)


def _gold_parquet(path, keys, sure):
    link = pa.list_(pa.struct([("source", pa.int32()), ("target", pa.int32())]))
    pq.write_table(pa.table({"key": keys, "sure": pa.array(sure, link),
                             "possible": pa.array([[] for _ in keys], link)}), path)
    return str(path)


def test_gold_with_a_parquet_corpus_and_bad_gold_files(spark, tmp_path, capsys):
    table = pa.table({"doc": [f"d{i}" for i in range(15)], "source": TOY_SOURCE * 3, "target": TOY_TARGET * 3})
    pq.write_table(table, tmp_path / "c.parquet")
    gold = _gold_parquet(tmp_path / "g.parquet", ["d0", "d3", "nowhere"],
                         [[{"source": 0, "target": 0}, {"source": 1, "target": 1}],
                          [{"source": 3, "target": 3}], []])
    base = ["train", "--corpus", str(tmp_path / "c.parquet"), "--id-column", "doc", "--stages", "ibm1:2",
            "--directions", "forward", "--master", "local[2]"]
    assert main([*base, "--run", str(tmp_path / "run"), "--gold", gold, "--gold-id-column", "key"]) == 0
    out = capsys.readouterr().out
    assert "gold: 2 of 3 gold pairs found among the trained pairs (1 not" in out
    assert sum(" gold P " in x for x in out.splitlines()) == 2
    g = manifest(str(tmp_path / "run"), "00-ibm1", 2)["metrics"]["gold"]
    assert g["n_sentences"] == 2 and g["n_missing"] == 1 and "forward" not in g

    # a duplicated link is found before anything is written
    dup = _gold_parquet(tmp_path / "dup.parquet", ["d0"], [[{"source": 0, "target": 0}, {"source": 0, "target": 0}]])
    assert main([*base, "--run", str(tmp_path / "r2"), "--gold", dup, "--gold-id-column", "key"]) == 2
    err = capsys.readouterr().err.strip()
    assert "row 'd0'" in err and "listed twice" in err and len(err.splitlines()) == 1
    assert not (tmp_path / "r2").exists()
    # a link outside its pair is found once the corpus is tokenized, before any iteration
    far = _gold_parquet(tmp_path / "far.parquet", ["d1"], [[{"source": 2, "target": 0}]])
    assert main([*base, "--run", str(tmp_path / "r3"), "--gold", far, "--gold-id-column", "key"]) == 2
    err = capsys.readouterr().err.strip()
    assert "row 'd1': gold link 2-0 is outside the sentence pair (2 source x 2 target tokens)" in err
    assert not (tmp_path / "r3" / "checkpoints").exists()


def test_resume_covers_both_directions_of_a_two_stage_run(spark, tmp_path):
    """Interrupted after hmm:1 and resumed: every direction's table, jump weights and alignments as if straight."""
    s, t = write_text(tmp_path, TOY_SOURCE * 3, TOY_TARGET * 3)
    corpus = CorpusConfig(source_text=s, target_text=t)
    straight, resumed = str(tmp_path / "straight"), str(tmp_path / "resumed")
    quiet = lambda _: None  # noqa: E731
    train(spark, config(corpus, "ibm1:2,hmm:2", directions="both"), straight, log=quiet)
    train(spark, config(corpus, "ibm1:2,hmm:1", directions="both"), resumed, log=quiet)
    train(spark, config(corpus, "ibm1:2,hmm:2", directions="both"), resumed, resume=True, log=quiet)
    a, b = read_table(straight, "01-hmm", 2), read_table(resumed, "01-hmm", 2)
    for d in (0, 1):
        rows_a = a.filter(pa.compute.equal(a.column("dir"), d))
        assert rows_a.num_rows > 0
        assert rows_a.equals(b.filter(pa.compute.equal(b.column("dir"), d)))
    dense_a, dense_b = manifest(straight, "01-hmm", 2)["dense"], manifest(resumed, "01-hmm", 2)["dense"]
    assert set(dense_a) == {"forward", "reverse"} and dense_a == dense_b
    out_a, out_b = read_output(straight), read_output(resumed)
    for column in ("alignment", "alignment_forward", "alignment_reverse"):
        assert out_a.column(column).equals(out_b.column(column)), column
