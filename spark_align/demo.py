"""``spark-align demo``: an invented corpus, trained in local mode, with results shown.

The corpus is generated (``spark_align.corpus.synthetic``): two made-up
languages whose sentences are translations of each other word by word with
local reordering, dropped and inserted words, so the true alignment of every
pair is known and the demo can say how good the learnt one is.
"""
from __future__ import annotations

import os
import shutil

import pyarrow.parquet as pq

from spark_align.config import CorpusConfig, RunConfig, parse_stages
from spark_align.corpus import synthetic
from spark_align.engine.run import train
from spark_align.errors import RunDirError

MARKER = "spark-align-demo.txt"


def prepare_dir(path: str) -> None:
    """Create ``path``, or replace it if it holds an earlier demo; refuse anything else."""
    if os.path.exists(path):
        if not os.path.exists(os.path.join(path, MARKER)):
            if os.listdir(path):
                raise RunDirError(f"{path} exists and is not a demo directory; choose another --dir")
        shutil.rmtree(path)
    os.makedirs(path)
    with open(os.path.join(path, MARKER), "w") as fh:
        fh.write("Written by `spark-align demo`; safe to delete.\n")


def run_demo(spark, *, demo_dir: str, n_pairs: int = 3000, stages: str = "ibm1:5", directions: str = "both",
             log=print) -> dict:
    demo_dir = os.path.abspath(demo_dir)
    prepare_dir(demo_dir)
    corpus_dir = os.path.join(demo_dir, "corpus")
    table = synthetic.demo_corpus(n_pairs)
    synthetic.write_parquet(table.rename_columns(["id", "source", "target", "gold"]), corpus_dir)
    log(f"demo corpus: {n_pairs} invented sentence pairs with known alignments in {corpus_dir}")
    cfg = RunConfig(corpus=CorpusConfig(path=corpus_dir, id_column="id"), stages=parse_stages(stages),
                    directions=directions)
    run_dir = os.path.join(demo_dir, "run")
    manifest = train(spark, cfg, run_dir, log=log)
    out = pq.read_table(os.path.join(run_dir, "output")).sort_by("id")
    log("")
    log("example alignments (source word -> target word, * = matches the known true link):")
    for row in out.slice(0, 3).to_pylist():
        src, tgt = row["source"].split(), row["target"].split()
        gold = {(g["source"], g["target"]) for g in row["gold"]}
        links = " ".join(f"{src[a['source']]}-{tgt[a['target']]}{'*' if (a['source'], a['target']) in gold else ''}"
                         for a in row["alignment"])
        log(f"  {row['source']}\n    => {row['target']}\n    links: {links}")
    correct = total_pred = total_gold = 0
    for pred, gold in zip(out.column("alignment").to_pylist(), out.column("gold").to_pylist()):
        p = {(a["source"], a["target"]) for a in pred or []}
        g = {(a["source"], a["target"]) for a in gold}
        correct, total_pred, total_gold = correct + len(p & g), total_pred + len(p), total_gold + len(g)
    precision, recall = correct / max(total_pred, 1), correct / max(total_gold, 1)
    log(f"against the known alignments: precision {precision:.3f}, recall {recall:.3f}")
    log(f"outputs: aligned corpus {os.path.join(run_dir, 'output')} (Parquet, column 'alignment'); "
        f"checkpoints {os.path.join(run_dir, 'checkpoints')}")
    report = write_demo_report(run_dir, log)
    return {**manifest, "precision": precision, "recall": recall, "run_dir": run_dir, "report": report}


def write_demo_report(run_dir: str, log=print) -> str | None:
    """Write RUN_DIR/report.html and say where; without matplotlib, say how to get it instead."""
    try:
        import matplotlib  # noqa: F401
    except ImportError:
        log("report: matplotlib is not installed; pip install 'spark_align[report]' and then run "
            f"spark-align report --run {run_dir}")
        return None
    from spark_align.report import write_report

    path = write_report(run_dir)
    log(f"report: {path} (open it in a browser)")
    return path
