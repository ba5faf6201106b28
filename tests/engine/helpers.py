"""Small corpora and readers shared by the engine tests."""
from __future__ import annotations

import json
import os

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from spark_align.config import CorpusConfig, RunConfig, parse_stages
from spark_align.engine import shipping
from spark_align.engine.mstep import part_name

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


def routed_records(tmp_path, unit_keys: dict[int, np.ndarray], entries: dict[int, tuple], n_buckets: int,
                   directions=("forward", "reverse")) -> dict[int, list[bytes]]:
    """The routes of ``unit_keys`` written as the routes job writes them, then every bucket's lookup
    over its table ``entries`` (direction index -> (keys, probs)), in-process: unit -> its records."""
    pieces: dict[int, list] = {}
    for unit, keys in unit_keys.items():
        for p, piece in shipping.unit_routes(unit, keys, n_buckets):
            pieces.setdefault(p, []).append(piece)
    root = tmp_path / "routes"
    root.mkdir(parents=True, exist_ok=True)
    for p in range(n_buckets):
        with open(root / part_name(p), "wb") as fh:
            shipping.write_routes(fh, sorted(pieces.get(p, [])))
    lookup = shipping.make_route_lookup(str(root), directions)
    routed: dict[int, list[bytes]] = {}
    for p in range(n_buckets):
        mine = {}
        for d, (keys, probs) in entries.items():
            sel = shipping.key_buckets(keys, d, n_buckets) == p
            mine[d] = (keys[sel], probs[sel])
        for unit, record in lookup(p, mine):
            routed.setdefault(unit, []).append(record)
    return routed
