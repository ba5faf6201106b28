"""Small corpora and readers shared by the engine tests."""
from __future__ import annotations

import json
import os

import pyarrow as pa
import pyarrow.parquet as pq

from spark_align.config import CorpusConfig, RunConfig, parse_stages

TOY_SOURCE = ["das haus", "das buch", "ein buch", "ein haus ist klein", "das haus ist gross"]
TOY_TARGET = ["the house", "the book", "a book", "a house is small", "the house is big"]


def write_text(tmp_path, source, target, name="c"):
    s, t = tmp_path / f"{name}.src", tmp_path / f"{name}.tgt"
    s.write_text("".join(f"{x}\n" for x in source), encoding="utf-8")
    t.write_text("".join(f"{x}\n" for x in target), encoding="utf-8")
    return str(s), str(t)


def write_parquet(tmp_path, table: pa.Table, name="corpus.parquet"):
    path = tmp_path / name
    pq.write_table(table, path)
    return str(path)


def config(corpus: CorpusConfig, stages="ibm1:3", **kw) -> RunConfig:
    return RunConfig(corpus=corpus, stages=parse_stages(stages), **kw)


def read_output(run_dir: str) -> pa.Table:
    return pq.read_table(os.path.join(run_dir, "output")).sort_by("_row")


def read_table(run_dir: str, stage_dir: str, iteration: int) -> pa.Table:
    path = os.path.join(run_dir, "checkpoints", stage_dir, f"iter-{iteration:04d}", "lex")
    return pq.read_table(path).sort_by([("dir", "ascending"), ("src", "ascending"), ("tgt", "ascending")])


def manifest(run_dir: str, stage_dir: str, iteration: int) -> dict:
    path = os.path.join(run_dir, "checkpoints", stage_dir, f"iter-{iteration:04d}", "manifest.json")
    with open(path) as fh:
        return json.load(fh)
