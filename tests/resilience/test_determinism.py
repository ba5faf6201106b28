"""Determinism: the same configuration gives bit-identical tables, whatever the shuffle partitioning.

E-step values are summed as 64-bit integers (``engine/estep.py``), so the order
in which Spark's shuffle delivers partial sums cannot change a table bit: runs
with 2 and 7 shuffle partitions (adaptive coalescing off, so the counts really
differ) must be identical. (Runs with the same partitioning are compared bit
for bit across separate processes by the kill and retry tests in
``test_kill_resume.py``.) Reading the corpus as seven files in many small input
partitions changes which pairs share an encoded block (blocks are runs of
consecutive rows of one input partition), hence the order of the
floating-point sums inside a block: those runs must agree to 1e-9 relative.
"""
from __future__ import annotations

import contextlib
import json

import numpy as np
import pyarrow.compute as pc
import pytest

from spark_align.config import CorpusConfig
from spark_align.corpus.synthetic import generate, write_parquet
from spark_align.engine.run import train
from tests.engine.helpers import config
from tests.resilience.proc import lex_table, output_table

pytestmark = [pytest.mark.spark, pytest.mark.slow]

STAGES = "ibm1:1,hmm:1"
CHECKPOINTS = [("00-ibm1", 1), ("01-hmm", 1)]


@contextlib.contextmanager
def spark_conf(spark, **settings):
    old = {k: spark.conf.get(k, None) for k in settings}
    for k, v in settings.items():
        spark.conf.set(k, v)
    try:
        yield
    finally:
        for k, v in old.items():
            if v is None:
                spark.conf.unset(k)
            else:
                spark.conf.set(k, v)


@pytest.fixture(scope="module")
def corpora(tmp_path_factory):
    base = tmp_path_factory.mktemp("determinism")
    table = generate(240, seed=11, max_len=12).select(["id", "source", "target"])
    write_parquet(table, str(base / "one"), n_files=1)
    write_parquet(table, str(base / "seven"), n_files=7)
    return base


def run(spark, corpora, tmp_path_factory, layout: str, **conf) -> str:
    run_dir = str(tmp_path_factory.mktemp("det-run") / "run")
    cfg = config(CorpusConfig(path=str(corpora / layout), id_column="id"), STAGES, directions="both", block_size=16)
    with spark_conf(spark, **{"spark.sql.adaptive.coalescePartitions.enabled": "false", **conf}):
        train(spark, cfg, run_dir, log=lambda _: None)
    return run_dir


@pytest.fixture(scope="module")
def runs(spark, corpora, tmp_path_factory):
    return {
        "a": run(spark, corpora, tmp_path_factory, "one", **{"spark.sql.shuffle.partitions": "2"}),
        "b": run(spark, corpora, tmp_path_factory, "one", **{"spark.sql.shuffle.partitions": "7"}),
        "split": run(spark, corpora, tmp_path_factory, "seven", **{"spark.sql.shuffle.partitions": "5",
                                                                   "spark.sql.files.maxPartitionBytes": "4096",
                                                                   "spark.sql.files.openCostInBytes": "1024"}),
    }


def test_same_config_is_bit_identical_whatever_the_shuffle_partitions(runs):
    for stage_dir, it in CHECKPOINTS:
        assert lex_table(runs["a"], stage_dir, it).equals(lex_table(runs["b"], stage_dir, it)), (stage_dir, it)
    assert output_table(runs["a"]).equals(output_table(runs["b"]))


def test_other_input_partitioning_agrees_to_1e9_relative(spark, runs):
    from pyspark.sql import functions as F

    n_parts = spark.read.parquet(f"{runs['split']}/corpus").select(
        (F.col("_row") / 2 ** 33).cast("long").alias("p")).distinct().count()
    assert n_parts >= 7  # the corpus really was read in several partitions ...
    n_blocks = [json.load(open(f"{runs[k]}/encoded.json"))["n_blocks"] for k in ("a", "split")]
    assert n_blocks[0] != n_blocks[1]  # ... so other pairs share a block
    worst = 0.0
    for stage_dir, it in CHECKPOINTS:
        a, s = lex_table(runs["a"], stage_dir, it), lex_table(runs["split"], stage_dir, it)
        for key in ("dir", "src", "tgt"):
            assert a.column(key).equals(s.column(key))
        pa_, ps = a.column("prob").to_numpy(), s.column("prob").to_numpy()
        rel = np.abs(pa_ - ps) / np.abs(pa_)
        worst = max(worst, float(rel.max()))
        assert rel.max() <= 1e-9, (stage_dir, it, rel.max())
    print(f"largest relative table difference between input layouts: {worst:.3g}")
    # Rows are matched by the carried id (their _row differs with the layout).
    a = output_table(runs["a"]).sort_by("id")
    s = output_table(runs["split"]).sort_by("id")
    assert a.column("id").equals(s.column("id")) and a.column("source").equals(s.column("source"))
    for name in ("score_forward", "score_reverse"):
        x, y = a.column(name).to_numpy(), s.column(name).to_numpy()
        assert np.allclose(x, y, rtol=1e-9, atol=0), name
    links = lambda t: [[(k["source"], k["target"]) for k in row] for row in t.column("alignment").to_pylist()]
    assert links(a) == links(s)
    post_a = pc.list_flatten(a.column("alignment")).combine_chunks().field("posterior").to_numpy()
    post_s = pc.list_flatten(s.column("alignment")).combine_chunks().field("posterior").to_numpy()
    assert np.allclose(post_a, post_s, rtol=1e-9, atol=0)
