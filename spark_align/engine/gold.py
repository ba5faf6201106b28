"""Alignment quality against gold links after every training iteration (``train --gold``).

Cost: hand-aligned sets are small (hundreds to thousands of pairs), so the gold
rows are cut out of their encoded blocks once, after ingestion (a Spark job over
the blocks that contain a gold row; each such block is re-encoded with only its
gold pairs), and brought to the driver. After each iteration the driver fetches
the slice of the new translation table those pairs need (a broadcast join of
the checkpoint table with the gold pairs' dictionary keys: one scan of the
table, only matching rows leave the executors), decodes the gold pairs in
numpy with the same decoder as the output corpus, and scores them. An
iteration's extra cost is therefore one table scan plus decoding a few
thousand pairs, whatever the size of the corpus.

How gold rows are found in the corpus:

* text corpus: the gold key is the line number (a text gold file counts lines;
  a Parquet gold file names its line-number column with ``--gold-id-column``,
  default ``line``);
* Parquet corpus with ``--id-column``: the gold key is that column's value (a
  Parquet gold file's key column is ``--gold-id-column``, default the same name);
* Parquet corpus and a text gold file: line N is the N-th row in ``_row`` order
  (the order of the output corpus, which is file order for a single-file corpus).

Gold rows not in the corpus, and gold rows of pairs that were not trained on
(empty, too long, unbalanced), are counted as missing and reported.
"""
from __future__ import annotations

import time
from collections.abc import Callable, Hashable
from dataclasses import dataclass

import numpy as np
import pyarrow as pa

from spark_align import evaluate as ev
from spark_align.config import CorpusConfig, RunConfig
from spark_align.engine.ingest import (BLOCK_SCHEMA, MONO_PARTITION_SHIFT, ROW, block_batch, block_id_of,
                                       blocks_from_batch)
from spark_align.engine.tables import DirectionTable, Held, tables_from_arrow
from spark_align.errors import ConfigError, InputError
from spark_align.kernels import ragged
from spark_align.store import RunStore

SCORED_COLUMNS = ("alignment", "alignment_forward", "alignment_reverse")
REPORTED = ("precision", "recall", "f1", "aer", "n_sentences", "n_predicted", "n_sure")


@dataclass(frozen=True)
class GoldSet:
    """Parsed gold links: ``rows`` maps a key (line number or id) to its links; ``by_line`` says how keys count."""

    path: str
    rows: dict[Hashable, ev.GoldAlignment]
    by_line: bool   # keys are 1-based line / row-order numbers rather than id values
    text: bool      # a text file (errors name a line) rather than Parquet (errors name a row key)


def _is_parquet(path: str) -> bool:
    from spark_align.commands.evaluate import is_parquet

    return is_parquet(path)


def load_gold(path: str, corpus: CorpusConfig, *, id_column: str | None = None) -> GoldSet:
    """Parse a gold file (checks format, duplicates and negative positions; nothing touches Spark).

    Link ranges are checked later, by :meth:`GoldMonitor.build`, when the sentence lengths are known.
    """
    if not _is_parquet(path):
        if id_column is not None:
            raise ConfigError("--gold-id-column applies to a Parquet gold file; a text gold file is keyed by line")
        return GoldSet(path, ev.read_gold_text(path), by_line=True, text=True)
    if corpus.is_text:
        column = id_column or "line"
        rows = ev.read_gold_parquet(path, id_column=column)
        bad = next((k for k in rows if isinstance(k, bool) or not isinstance(k, (int, np.integer))), None)
        if bad is not None:
            raise InputError(f"{path}: key {bad!r} in column {column!r} is not a line number; with a text "
                             "corpus the gold key is the 1-based line number")
        return GoldSet(path, rows, by_line=True, text=False)
    column = id_column or corpus.id_column
    if column is None:
        raise ConfigError("--gold with a Parquet gold file and a Parquet corpus needs --id-column (the corpus key) "
                          "and, if the gold key column is named differently, --gold-id-column")
    if corpus.id_column is None:
        raise ConfigError("--gold with a Parquet gold file needs --id-column: the corpus column its keys refer to")
    return GoldSet(path, ev.read_gold_parquet(path, id_column=column), by_line=False, text=False)


def _rows_by_line(spark, store: RunStore, cfg: RunConfig, lines: list) -> dict:
    """gold line number -> ``_row``."""
    if cfg.corpus.is_text:
        return {k: k - 1 for k in lines if k >= 1}  # the text snapshot's _row is the 0-based line index
    from pyspark.sql import functions as F

    # _row = partition << 33 | index in partition (contiguous from 0): per-partition counts give each rank.
    parts = (spark.read.parquet(store.spark_path("corpus"))
             .groupBy(F.shiftright(F.col(ROW), MONO_PARTITION_SHIFT).alias("part")).count()
             .orderBy("part").collect())
    starts = np.cumsum([0] + [r["count"] for r in parts])
    out = {}
    for line in lines:
        k = int(np.searchsorted(starts, line - 1, side="right")) - 1
        if line >= 1 and 0 <= k < len(parts):
            out[line] = (int(parts[k]["part"]) << MONO_PARTITION_SHIFT) | (line - 1 - int(starts[k]))
    return out


def _rows_by_id(spark, store: RunStore, cfg: RunConfig, keys: list, path: str) -> dict:
    """gold id -> ``_row`` through the snapshot's id column; an id on two corpus rows is an error."""
    from pyspark.sql import functions as F

    column = cfg.corpus.id_column
    found = (spark.read.parquet(store.spark_path("corpus")).select(column, ROW)
             .filter(F.col(column).isin(keys)).collect())
    out = {}
    for row in found:
        key = row[column]
        if key in out:
            raise InputError(f"{path}: gold key {key!r} matches more than one corpus row in column {column!r}; "
                             "the corpus id column must be unique for the gold rows")
        out[key] = row[ROW]
    return out


def _subset_blocks(block_size: int, gold_rows: np.ndarray):
    """``mapInArrow`` function: each block re-encoded with only its gold pairs (pure numpy per block)."""

    def run(batches):
        for batch in batches:
            for block_id, rows, block in blocks_from_batch(batch):
                keep = np.isin(rows, gold_rows)
                if not keep.any():
                    continue
                src_len, tgt_len = ragged.lengths(block.src_offsets), ragged.lengths(block.tgt_offsets)
                src_tok = keep[ragged.row_of(block.src_offsets)]
                tgt_tok = keep[ragged.row_of(block.tgt_offsets)]
                sub = ragged.build_block(ragged.offsets_from_lengths(src_len[keep]), block.src_ids[src_tok],
                                         ragged.offsets_from_lengths(tgt_len[keep]), block.tgt_ids[tgt_tok])
                yield block_batch(block_id, rows[keep], sub)

    return run


class GoldMonitor:
    """Scores the gold pairs after each iteration (see the module docstring for the cost)."""

    def __init__(self, spark, cfg: RunConfig, gold: GoldSet, blocks: pa.Table, key_of_row: dict,
                 n_missing: int) -> None:
        from pyspark.sql import functions as F

        self.spark, self.cfg, self.gold = spark, cfg, gold
        self.blocks, self.key_of_row, self.n_missing = blocks, key_of_row, n_missing
        keys = (ragged.distinct(np.concatenate([block.dict_keys for batch in blocks.to_batches()
                                                for _id, _rows, block in blocks_from_batch(batch)]))
                if blocks.num_rows else np.zeros(0, np.int64))
        src, tgt = ragged.split_key(keys)
        self._keys_frame = spark.createDataFrame(
            pa.table({"src": src.astype(np.int32), "tgt": tgt.astype(np.int32)}).to_pandas()).persist()
        self.keys_df = F.broadcast(self._keys_frame)

    @classmethod
    def build(cls, spark, cfg: RunConfig, store: RunStore, gold: GoldSet,
              log: Callable[[str], None] = print) -> "GoldMonitor":
        """Find the gold rows in the ingested corpus, check their links' ranges, cut their blocks out."""
        from pyspark.sql import functions as F

        keys = list(gold.rows)
        row_of_key = (_rows_by_line(spark, store, cfg, keys) if gold.by_line
                      else _rows_by_id(spark, store, cfg, keys, gold.path))
        gold_rows = np.array(sorted(row_of_key.values()), dtype=np.int64)
        block_ids = np.unique(block_id_of(gold_rows, cfg.block_size)).tolist()
        blocks = store.spark_path("encoded", "blocks")
        subset = (spark.read.parquet(blocks).filter(F.col("block_id").isin(block_ids))
                  .mapInArrow(_subset_blocks(cfg.block_size, gold_rows), BLOCK_SCHEMA)).toArrow()
        key_of_row = {row: key for key, row in row_of_key.items()}
        trained = set()
        for batch in subset.to_batches():
            for _bid, rows, block in blocks_from_batch(batch):
                src_len, tgt_len = ragged.lengths(block.src_offsets), ragged.lengths(block.tgt_offsets)
                for row, n_src, n_tgt in zip(rows.tolist(), src_len.tolist(), tgt_len.tolist()):
                    key = key_of_row[row]
                    _check_range(gold, key, n_src, n_tgt)
                    trained.add(key)
        n_missing = len(keys) - len(trained)
        if not trained:
            raise InputError(f"{gold.path}: none of its {len(keys)} gold rows is a trained pair of the corpus "
                             f"(first gold key {keys[0]!r}); check the keys (--gold-id-column, --id-column)"
                             if keys else f"{gold.path}: the gold file holds no rows")
        log(f"gold: {len(trained)} of {len(keys)} gold pairs found among the trained pairs"
            + (f" ({n_missing} not: absent from the corpus or skipped)" if n_missing else "")
            + "; scored after every iteration")
        return cls(spark, cfg, gold, subset, key_of_row, n_missing)

    def tables(self, table_path: str) -> dict[str, DirectionTable]:
        """The slice of a checkpoint table the gold pairs need, per direction."""
        directions = self.cfg.direction_list
        table = self.spark.read.parquet(table_path).join(self.keys_df, on=["src", "tgt"]).toArrow()
        return tables_from_arrow(table, directions)

    def measure(self, model, table_path: str, dense: dict) -> dict:
        """Precision, recall, F1, AER (and counts) of each output column after an iteration."""
        from spark_align.engine.output import make_decoder

        started = time.time()
        cfg = self.cfg
        decode = make_decoder(model, cfg.direction_list, Held(self.tables(table_path)), dense,
                              method=cfg.decoding, threshold=cfg.posterior_threshold,
                              symmetrization=cfg.symmetrization)
        predicted = {c: {} for c in SCORED_COLUMNS}
        for out in decode(self.blocks.to_batches()):
            rows = out.column(0).to_pylist()
            for c in SCORED_COLUMNS:
                links = out.column(out.schema.get_field_index(c)).to_pylist()
                for row, row_links in zip(rows, links):
                    predicted[c][self.key_of_row[row]] = frozenset((x["source"], x["target"]) for x in row_links)
        columns = ("alignment",) + (("alignment_forward", "alignment_reverse") if len(cfg.direction_list) == 2 else ())
        result = {}
        for c in columns:
            report = ev.evaluate(predicted[c], self.gold.rows)
            result[c] = {k: report["overall"][k] for k in REPORTED}
        return {**result["alignment"], "n_missing": self.n_missing, "file": self.gold.path,
                **{c.split("_")[1]: result[c] for c in columns[1:]}, "seconds": time.time() - started}

    def close(self) -> None:
        self._keys_frame.unpersist()


def _check_range(gold: GoldSet, key, n_src: int, n_tgt: int) -> None:
    outside = sorted(link for link in gold.rows[key].possible if not (link[0] < n_src and link[1] < n_tgt))
    if outside:
        where = f"line {key}" if gold.text else f"row {key!r}"
        i, j = outside[0]
        raise InputError(f"{gold.path}: {where}: gold link {i}-{j} is outside the sentence pair "
                         f"({n_src} source x {n_tgt} target tokens)")


def progress_part(gold: dict) -> str:
    """The gold figures of a progress line."""
    def f(x):
        return "n/a" if x is None or x != x else f"{x:.3f}"

    return f"gold P {f(gold['precision'])} R {f(gold['recall'])} F1 {f(gold['f1'])} AER {f(gold['aer'])}"
