"""Ingestion as Spark jobs: snapshot, checks, tokens, vocabularies, encoded blocks.

Costs and invariants:

* The input is copied once into ``RUN_DIR/corpus`` with a stable ``_row`` id
  (line index for text input; Spark's monotonically increasing id, which
  preserves read order, for Parquet). Every later job, including the output,
  reads the snapshot, so a run never mixes two versions of its input.
* Vocabularies are counted in Spark. Ids are assigned by one global sort on
  (count descending, word); id 0 is NULL on both sides. The id assignment runs
  in a single task: fine up to tens of millions of distinct words.
* Encoding ships each vocabulary to the executors as a broadcast hash index
  (about 100 bytes per word per executor Python worker).
* Pairs are grouped into blocks of ``block_size`` consecutive ``_row`` ids;
  each block carries its own pair dictionary and link grid
  (see ``spark_align.kernels.ragged``): 4 bytes per link cell on disk, built
  once here so that no E-step ever sorts or hashes.
* The two big arrays of a block, ``dict_keys`` (int64) and ``grid`` (int32),
  are stored as one binary value each (the array's little-endian bytes), not
  as Parquet lists: a list carries repetition and definition levels for every
  element, and decoding them cost more than the data (reading a row group of
  blocks took 2-3x longer). Blocks written as lists by earlier versions are
  still read (:func:`block_array`).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pyarrow as pa

from spark_align.config import RunConfig
from spark_align.corpus import text as text_io
from spark_align.errors import InputError
from spark_align.kernels import ragged
from spark_align.store import RunStore

ROW = "_row"
# Columns the output corpus adds beside the input's: an input column may not already use these names.
RESERVED_COLUMNS = (ROW, "alignment", "alignment_forward", "alignment_reverse", "score_forward",
                    "score_reverse", "skip_reason")
MONO_PARTITION_SHIFT = 33  # monotonically_increasing_id puts the partition index above bit 33

BLOCK_SCHEMA = ("block_id long, rows array<long>, src_len array<int>, src_ids array<int>, "
                "tgt_len array<int>, tgt_ids array<int>, dict_keys binary, grid binary")
# Element types of the columns stored as binary values (little-endian array bytes).
BLOB_DTYPES = {"dict_keys": np.dtype("<i8"), "grid": np.dtype("<i4")}
TOKENS_SCHEMA = "_row long, skip_reason string, src array<string>, tgt array<string>"


@dataclass(frozen=True)
class IngestSummary:
    n_rows: int
    n_kept: int
    skipped: dict[str, int]
    n_src_tokens: int
    n_tgt_tokens: int
    src_vocab_size: int
    tgt_vocab_size: int
    n_blocks: int


def block_id_of(row: np.ndarray, block_size: int) -> np.ndarray:
    """Block of each ``_row``: consecutive rows of one input partition share a block."""
    part = row >> MONO_PARTITION_SHIFT
    index = row & ((1 << MONO_PARTITION_SHIFT) - 1)
    return (part << MONO_PARTITION_SHIFT) | (index // block_size)


# -- snapshot and checks ---------------------------------------------------------------
def validate(spark, cfg: RunConfig) -> int | None:
    """Every input check that can fail, run before anything is written.

    Returns the number of lines for text input (None for Parquet).
    """
    c = cfg.corpus
    if c.is_text:
        return text_io.count_and_check(c.source_text, c.target_text)
    df = _read_parquet_input(spark, c.path)
    _check_columns(df, c)
    if df.limit(1).count() == 0:
        raise InputError(f"the corpus is empty: {c.path} has no rows")
    _check_nulls(spark, c)
    return None


def snapshot(spark, cfg: RunConfig, store: RunStore) -> int:
    """Copy the (validated) input to ``RUN_DIR/corpus`` with ``_row``; returns the row count."""
    c = cfg.corpus
    if c.is_text:
        return text_io.write_text_snapshot(c.source_text, c.target_text, store.fsspec_path("corpus"))
    from pyspark.sql import functions as F

    out = store.spark_path("corpus")
    _read_parquet_input(spark, c.path).withColumn(ROW, F.monotonically_increasing_id()) \
        .write.mode("overwrite").parquet(out)
    return spark.read.parquet(out).count()


def _read_parquet_input(spark, path: str):
    from pyspark.errors import AnalysisException

    try:
        return spark.read.parquet(path)
    except AnalysisException as exc:
        msg = str(exc).splitlines()[0]
        if "PATH_NOT_FOUND" in msg or "does not exist" in msg:
            raise InputError(f"corpus {path}: no such file or directory") from None
        if "UNABLE_TO_INFER_SCHEMA" in msg:
            raise InputError(f"corpus {path}: no Parquet data found there (empty directory?)") from None
        raise InputError(f"corpus {path}: cannot read it as Parquet ({msg})") from None
    except Exception as exc:  # Py4J errors from unreadable files
        raise InputError(f"corpus {path}: cannot read it as Parquet ({str(exc).splitlines()[0]})") from None


def _check_columns(df, c) -> None:
    from pyspark.sql.types import StringType

    fields = {f.name: f.dataType for f in df.schema.fields}
    for role, name in (("source", c.source_column), ("target", c.target_column)):
        if name not in fields:
            raise InputError(f"corpus {c.path}: no {role} column {name!r} (columns: {', '.join(fields)}); "
                             f"use --{role}-column")
        if not isinstance(fields[name], StringType):
            raise InputError(f"corpus {c.path}: {role} column {name!r} has type "
                             f"{fields[name].simpleString()}, expected string")
    if c.id_column is not None and c.id_column not in fields:
        raise InputError(f"corpus {c.path}: no id column {c.id_column!r} (columns: {', '.join(fields)})")
    taken = sorted(set(fields) & set(RESERVED_COLUMNS))
    if taken:
        raise InputError(f"corpus {c.path}: column {taken[0]!r} is reserved for the output corpus "
                         f"(reserved: {', '.join(RESERVED_COLUMNS)}); rename it or leave it out")


def _check_nulls(spark, c) -> None:
    from pyspark.sql import functions as F

    df = spark.read.parquet(c.path).select(
        "_metadata.file_path", "_metadata.row_index", c.source_column, c.target_column)
    src, tgt = F.col(c.source_column), F.col(c.target_column)
    # Parquet strings are not checked by Spark's reader: bad bytes would fail the tokenizer mid-job.
    bad = df.filter(src.isNull() | tgt.isNull() | ~F.is_valid_utf8(src) | ~F.is_valid_utf8(tgt))
    first = bad.select("file_path", "row_index", src.isNull().alias("src_null"), tgt.isNull().alias("tgt_null"),
                       F.is_valid_utf8(src).alias("src_ok")).limit(1).collect()
    if first:
        row = first[0]
        n_bad = bad.count()
        where = f"{row['file_path']} row {row['row_index']}"
        if row["src_null"] or row["tgt_null"]:
            column = c.source_column if row["src_null"] else c.target_column
            raise InputError(f"{where}: null in column {column!r} ({n_bad} row(s) with nulls or invalid "
                             f"UTF-8); fill or drop them first")
        column = c.target_column if row["src_ok"] else c.source_column
        raise InputError(f"{where}: invalid UTF-8 in column {column!r} ({n_bad} row(s) with nulls or invalid "
                         f"UTF-8); fix the encoding first")


# -- tokens and vocabularies -----------------------------------------------------------
def tokens_frame(spark, cfg: RunConfig, store: RunStore):
    """(_row, skip_reason, src tokens, tgt tokens) for every snapshot row."""
    c = cfg.corpus
    src_col, tgt_col = ("source", "target") if c.is_text else (c.source_column, c.target_column)
    snap = spark.read.parquet(store.spark_path("corpus")).select(ROW, src_col, tgt_col)
    lowercase, max_length, max_ratio = c.lowercase, c.max_length, c.max_ratio

    def tokenize_batches(batches):
        for batch in batches:
            src = text_io.tokenize(batch.column(1), lowercase)
            tgt = text_io.tokenize(batch.column(2), lowercase)
            n_src = np.diff(src.offsets.to_numpy())
            n_tgt = np.diff(tgt.offsets.to_numpy())
            reasons = text_io.skip_reasons(n_src, n_tgt, max_length, max_ratio)
            yield pa.RecordBatch.from_arrays(
                [batch.column(0), pa.array(reasons, pa.string()), src, tgt],
                names=["_row", "skip_reason", "src", "tgt"])

    return snap.mapInArrow(tokenize_batches, TOKENS_SCHEMA)


def build_vocab(spark, tokens, side: str, out_path: str):
    """Count the words of one side (kept pairs only) and assign ids; written to ``out_path``."""
    from pyspark.sql import Window
    from pyspark.sql import functions as F

    counts = (tokens.filter(F.col("skip_reason").isNull())
              .select(F.explode(side).alias("word")).groupBy("word").count())
    order = Window.orderBy(F.desc("count"), F.asc("word"))
    vocab = counts.withColumn("id", F.row_number().over(order).cast("int"))  # 1.., 0 is NULL
    vocab.select("word", "id", "count").write.mode("overwrite").parquet(out_path)
    return spark.read.parquet(out_path)


def load_vocab_index(spark, path: str):
    """(pandas Index of words ordered by id - 1, size) from a written vocabulary."""
    import pandas as pd

    table = spark.read.parquet(path).select("word", "id").toArrow().sort_by("id")
    ids = table.column("id").to_numpy()
    if len(ids) and not np.array_equal(ids, np.arange(1, len(ids) + 1)):
        raise InputError(f"vocabulary {path} is damaged: ids are not 1..{len(ids)}")
    return pd.Index(table.column("word").to_pylist()), len(ids)


def encode_blocks(spark, tokens, src_index, tgt_index, block_size: int,
                  *, unknown_ids: tuple[int, int] | None = None):
    """Kept pairs -> one row per block (token ids, pair dictionary, link grid).

    ``unknown_ids`` (source id, target id) encodes words missing from the
    vocabularies (aligning new data); without it every word must be known
    (training), since a missing word would otherwise become NULL.
    """
    from pyspark.sql import functions as F

    sc = spark.sparkContext
    src_bc, tgt_bc = sc.broadcast(src_index), sc.broadcast(tgt_index)
    unknown = unknown_ids or (0, 0)

    def to_ids(batches):
        for batch in batches:
            rows = batch.column(0).to_numpy()
            out = [pa.array(block_id_of(rows, block_size)), batch.column(0)]
            for col, bc, unk in ((2, src_bc, unknown[0]), (3, tgt_bc, unknown[1])):
                lists = batch.column(col)
                ids = bc.value.get_indexer(lists.flatten().to_numpy(zero_copy_only=False)) + 1
                if unk:
                    ids[ids == 0] = unk
                out.append(pa.ListArray.from_arrays(
                    pa.array(lists.offsets.to_numpy() - lists.offsets[0].as_py()),
                    pa.array(ids.astype(np.int32))))
            yield pa.RecordBatch.from_arrays(out, names=["block_id", "_row", "src_ids", "tgt_ids"])

    encoded = (tokens.filter(F.col("skip_reason").isNull())
               .mapInArrow(to_ids, "block_id long, _row long, src_ids array<int>, tgt_ids array<int>"))
    return encoded.groupBy("block_id").applyInArrow(_build_block_table, BLOCK_SCHEMA)


def _build_block_table(table: pa.Table) -> pa.Table:
    table = table.sort_by("_row")
    src, tgt = table.column("src_ids").combine_chunks(), table.column("tgt_ids").combine_chunks()
    block = ragged.build_block(_offsets(src), src.flatten().to_numpy(), _offsets(tgt), tgt.flatten().to_numpy())
    if np.any(block.grid < 0) or len(block.dict_keys) > np.iinfo(np.int32).max:
        raise ValueError("block dictionary overflow")
    return pa.Table.from_batches([block_batch(table.column("block_id")[0].as_py(), table.column("_row").to_numpy(),
                                              block)])


BLOCK_ARROW_SCHEMA = pa.schema([
    ("block_id", pa.int64()), ("rows", pa.list_(pa.int64())), ("src_len", pa.list_(pa.int32())),
    ("src_ids", pa.list_(pa.int32())), ("tgt_len", pa.list_(pa.int32())), ("tgt_ids", pa.list_(pa.int32())),
    ("dict_keys", pa.binary()), ("grid", pa.binary())])


def block_batch(block_id: int, rows: np.ndarray, block: ragged.Block) -> pa.RecordBatch:
    """One block as a one-row batch of ``BLOCK_SCHEMA`` (what ingestion writes, and the gold subset)."""
    def one_list(values: np.ndarray, kind) -> pa.ListArray:
        return pa.ListArray.from_arrays(pa.array([0, len(values)], pa.int32()), pa.array(values, kind))

    blob = {name: pa.array([np.ascontiguousarray(arr, dtype).tobytes()], pa.binary())
            for (name, dtype), arr in zip(BLOB_DTYPES.items(), (block.dict_keys, block.grid))}
    return pa.RecordBatch.from_arrays([
        pa.array([block_id], pa.int64()), one_list(np.asarray(rows, np.int64), pa.int64()),
        one_list(np.diff(block.src_offsets).astype(np.int32), pa.int32()), one_list(block.src_ids, pa.int32()),
        one_list(np.diff(block.tgt_offsets).astype(np.int32), pa.int32()), one_list(block.tgt_ids, pa.int32()),
        blob["dict_keys"], blob["grid"]], schema=BLOCK_ARROW_SCHEMA)


def _offsets(lists: pa.ListArray) -> np.ndarray:
    off = lists.offsets.to_numpy().astype(np.int64)
    return off - off[0]


def block_array(column: pa.Array, k: int, name: str) -> np.ndarray:
    """Row ``k`` of a block column as a numpy array (zero-copy where aligned): a binary value
    (``BLOB_DTYPES``) or, as earlier versions wrote every column, a list."""
    if pa.types.is_binary(column.type) or pa.types.is_large_binary(column.type):
        dtype = BLOB_DTYPES[name]
        if column.null_count and not column[k].is_valid:
            return np.zeros(0, dtype)
        # straight from the column's buffers: taking the value as a scalar (column[k].as_buffer())
        # cost 0.4 ms per block grid, 0.2 s per Model 1 iteration at 1M pairs
        _validity, offsets, data = column.buffers()
        width = np.dtype(np.int64 if pa.types.is_large_binary(column.type) else np.int32)
        start, stop = np.frombuffer(offsets, width, count=2, offset=(column.offset + k) * width.itemsize)
        if stop == start:
            return np.zeros(0, dtype)
        out = np.frombuffer(data, np.uint8, count=int(stop - start), offset=int(start)).view(dtype)
        if out.ctypes.data % dtype.itemsize:
            out = out.copy()  # compiled kernels want aligned arrays
        return out.astype(dtype.newbyteorder("="), copy=False)
    start, stop = column.offsets[k].as_py(), column.offsets[k + 1].as_py()
    return column.values.slice(start, stop - start).to_numpy()


OPTIONAL_COLUMNS = ("rows", "dict_keys")  # block columns a reader may leave out


def blocks_from_batch(batch: pa.RecordBatch) -> list[tuple[int, np.ndarray | None, ragged.Block]]:
    """(block_id, rows, Block) for every block row of an Arrow batch, as zero-copy numpy views. A batch
    read without ``rows`` or ``dict_keys`` (``engine.mstep.read_unit``'s ``columns``) gives None there."""
    cols = {name: batch.column(i) for i, name in enumerate(batch.schema.names)}
    out = []
    for k in range(batch.num_rows):
        def arr(name: str) -> np.ndarray | None:
            return block_array(cols[name], k, name) if name in cols or name not in OPTIONAL_COLUMNS else None

        src_len, tgt_len = arr("src_len"), arr("tgt_len")
        block = ragged.Block(ragged.offsets_from_lengths(src_len), arr("src_ids"),
                             ragged.offsets_from_lengths(tgt_len), arr("tgt_ids"),
                             arr("dict_keys"), ragged.offsets_from_lengths((src_len.astype(np.int64) + 1)
                                                                            * (tgt_len.astype(np.int64) + 1)),
                             arr("grid"))
        out.append((cols["block_id"][k].as_py(), arr("rows"), block))
    return out


def dict_entries(batches):
    """``mapInArrow`` function: block rows -> (block_id, idx, key), one row per dictionary entry
    (``dict_keys`` is a binary value, which Spark SQL cannot explode)."""
    for batch in batches:
        cols = {name: batch.column(i) for i, name in enumerate(batch.schema.names)}
        for k in range(batch.num_rows):
            keys = block_array(cols["dict_keys"], k, "dict_keys")
            yield pa.RecordBatch.from_arrays(
                [pa.array(np.full(len(keys), cols["block_id"][k].as_py(), np.int64)),
                 pa.array(np.arange(len(keys), dtype=np.int32)), pa.array(keys)], names=["block_id", "idx", "key"])


DICT_ENTRIES_SCHEMA = "block_id long, idx int, key long"


PAIRS_PER_ROW_GROUP = 8192  # encoded blocks per Parquet row group = this // block size (at least 1)


def write_blocks(blocks, path: str, block_size: int) -> None:
    """Write encoded blocks as the E-step and the output pass read them.

    Small row groups: a task reads whole row groups, so they bound its memory and are the units of
    work that spread the E-step and the decoding over tasks (blocks are MBs each: the byte limit alone
    is only checked every 100 rows). Not compressed: the blocks are read again in every iteration, and
    their link grids, most of what an iteration reads, shrink by a quarter at most with LZ4 (the
    dictionary keys, read only when a lookup must search, by half). Reading the E-step's columns of
    one file of 1M pairs (61 row groups) took 0.31 s memory-mapped against 0.58 s with LZ4, for 1.5x
    the space (LZ4 had taken 0.23 s against Snappy's 0.32 s at 100k pairs).
    """
    (blocks.write.mode("overwrite")
     .option("parquet.block.row.count.limit", max(1, PAIRS_PER_ROW_GROUP // block_size))
     .option("compression", "none")
     .parquet(path))


def ingest(spark, cfg: RunConfig, store: RunStore) -> IngestSummary:
    """Snapshot, tokens, vocabularies and encoded blocks; returns what it counted."""
    from pyspark.sql import functions as F

    n_rows = snapshot(spark, cfg, store)
    tokens = tokens_frame(spark, cfg, store).persist()
    try:
        stats = (tokens.groupBy("skip_reason")
                 .agg(F.count("*").alias("n"), F.sum(F.size("src")).alias("ns"), F.sum(F.size("tgt")).alias("nt"))
                 .collect())
        skipped = {r["skip_reason"]: int(r["n"]) for r in stats if r["skip_reason"] is not None}
        kept = [r for r in stats if r["skip_reason"] is None]
        n_kept = int(kept[0]["n"]) if kept else 0
        if n_kept == 0:
            raise InputError(f"no pair can be trained on: all {n_rows} rows were filtered out "
                             f"({', '.join(f'{k}: {v}' for k, v in sorted(skipped.items()))})")
        (tokens.filter(F.col("skip_reason").isNotNull()).select(ROW, "skip_reason")
         .write.mode("overwrite").parquet(store.spark_path("encoded", "skipped")))
        build_vocab(spark, tokens, "src", store.spark_path("vocab", "source"))
        build_vocab(spark, tokens, "tgt", store.spark_path("vocab", "target"))
        src_index, n_src_vocab = load_vocab_index(spark, store.spark_path("vocab", "source"))
        tgt_index, n_tgt_vocab = load_vocab_index(spark, store.spark_path("vocab", "target"))
        blocks = encode_blocks(spark, tokens, src_index, tgt_index, cfg.block_size)
        write_blocks(blocks, store.spark_path("encoded", "blocks"), cfg.block_size)
    finally:
        tokens.unpersist()
    n_blocks = spark.read.parquet(store.spark_path("encoded", "blocks")).count()
    return IngestSummary(n_rows=n_rows, n_kept=n_kept, skipped=skipped,
                         n_src_tokens=int(kept[0]["ns"]), n_tgt_tokens=int(kept[0]["nt"]),
                         src_vocab_size=n_src_vocab, tgt_vocab_size=n_tgt_vocab, n_blocks=n_blocks)
