"""Exports for the next tool in a pipeline: links text, lexical tables, lexical weighting tables.

Every export is a Spark job over a run directory (finished, or still training
for the lexical tables); the functions at the top are the pure pieces that run
inside the tasks.

Single ordered text files (links, TSV tables) are written in two steps, so
that no step needs the data in the driver's memory: Spark sorts the rows
globally (``orderBy``: range partitions, each sorted) and writes them as text
part files, part ``k`` holding the ``k``-th key range; the driver then
concatenates the parts in name order into ``NAME.tmp-<id>`` beside the final
file, copying 8 MB chunks through fsspec (constant driver memory, whatever the
corpus size), and moves it to ``NAME``. On a local or HDFS file system the
move is a rename, so the file appears whole or not at all; on object stores a
move is a copy that becomes visible when complete. The part folder is removed
afterwards, also on failure. The bytes pass once through the driver: at
100 MB/s a 10 GB links file takes under two minutes to concatenate.

Table folders (lexicon, lexical weights) follow the run directory's commit
protocol: ``export.json`` is removed first and written last, and lists what
the folder holds.
"""
from __future__ import annotations

import posixpath
import shutil
import time
import uuid
from collections.abc import Callable

import fsspec
import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from spark_align.corpus import text as text_io
from spark_align.errors import CheckpointError, ConfigError, RunDirError
from spark_align.store import FORMAT_VERSION, RunStore, fsspec_url

NULL_TOKEN = "<NULL>"
DEFAULT_MIN_PROB = 1e-4   # lexicon pruning threshold (our choice: drops floor and near-floor entries)
DEFAULT_TOP_K = 0         # 0 = no per-word limit
CHUNK_BYTES = 8 << 20
ALIGNMENT_COLUMNS = {"symmetrized": "alignment", "forward": "alignment_forward", "reverse": "alignment_reverse"}
TABLE_NAMES = {"forward": "target_given_source", "reverse": "source_given_target"}
FORMATS = ("parquet", "tsv", "both")
EXPORT_MARKER = "export.json"


# -- pure pieces (run inside tasks) -----------------------------------------------------------
def links_lines(alignment: pa.Array) -> pa.Array:
    """Each row's links as ``"i-j i-j ..."`` (source-target, 0-based); '' for null or empty lists.

    ``alignment``: list<struct<source, target, ...>> array, shape (n_rows,).
    Returns a string array, shape (n_rows,).
    """
    flat = pc.list_flatten(alignment)
    parent = pc.list_parent_indices(alignment).to_numpy()
    counts = np.bincount(parent, minlength=len(alignment)).astype(np.int32)
    offsets = np.zeros(len(alignment) + 1, dtype=np.int32)
    np.cumsum(counts, out=offsets[1:])
    pairs = pc.binary_join_element_wise(pc.cast(flat.field("source"), pa.string()),
                                        pc.cast(flat.field("target"), pa.string()), "-")
    return pc.binary_join(pa.ListArray.from_arrays(pa.array(offsets), pairs), " ")


def tsv_lines(source: pa.Array, target: pa.Array, probability: pa.Array) -> pa.Array:
    """``source<TAB>target<TAB>probability`` per row; probabilities in shortest round-trip form."""
    return pc.binary_join_element_wise(source, target, pc.cast(probability, pa.string()), "\t")


def aligned_word_pairs(src_text: pa.Array, tgt_text: pa.Array, alignment: pa.Array,
                       lowercase: bool) -> pa.Table:
    """Counts of aligned word pairs of some sentence pairs, NULL (null) for unaligned words.

    Every link (i, j) counts (source word i, target word j) once; every source
    word without a link counts (word, NULL), every target word without a link
    (NULL, word). ``src_text``/``tgt_text``: string arrays, shape (n_rows,),
    tokenized as in training; ``alignment``: list<struct<source, target>> of
    the same rows (no nulls). Returns a table (source string, target string,
    n int64), one row per distinct pair.
    """
    src = text_io.tokenize(src_text, lowercase)
    tgt = text_io.tokenize(tgt_text, lowercase)
    src_off, tgt_off = src.offsets.to_numpy(), tgt.offsets.to_numpy()
    src_words, tgt_words = src.values, tgt.values
    flat = pc.list_flatten(alignment)
    row = pc.list_parent_indices(alignment).to_numpy()
    src_tok = src_off[row] + flat.field("source").to_numpy(zero_copy_only=False)
    tgt_tok = tgt_off[row] + flat.field("target").to_numpy(zero_copy_only=False)
    src_linked = np.zeros(len(src_words), dtype=bool)
    tgt_linked = np.zeros(len(tgt_words), dtype=bool)
    src_linked[src_tok] = True
    tgt_linked[tgt_tok] = True
    lone_src = src_words.filter(pa.array(~src_linked))
    lone_tgt = tgt_words.filter(pa.array(~tgt_linked))
    pairs = pa.table({
        "source": pa.concat_arrays([src_words.take(pa.array(src_tok)), lone_src,
                                    pa.nulls(len(lone_tgt), pa.string())]),
        "target": pa.concat_arrays([tgt_words.take(pa.array(tgt_tok)), pa.nulls(len(lone_src), pa.string()),
                                    lone_tgt]),
        "n": np.ones(len(src_tok) + len(lone_src) + len(lone_tgt), dtype=np.int64),
    })
    got = pairs.group_by(["source", "target"]).aggregate([("n", "sum")])
    return pa.table({"source": got.column("source"), "target": got.column("target"), "n": got.column("n_sum")})


# -- files ------------------------------------------------------------------------------------
def _spark_and_fs(url: str) -> tuple[str, fsspec.AbstractFileSystem, str]:
    """(URL for Spark, fsspec file system, path in it) of a user-given output location."""
    if "://" not in url:
        import os

        url = os.path.abspath(url)
    fs, path = fsspec.core.url_to_fs(fsspec_url(url))
    return url, fs, path


def write_ordered_text(df, order_by: list[str], out: str, *, header: str | None = None,
                       overwrite: bool = False) -> int:
    """Write the string column ``value`` of ``df``, rows sorted by ``order_by``, to one file ``out``.

    See the module docstring for how order, streaming and atomicity are kept.
    Returns the number of bytes written.
    """
    spark_url, fs, path = _spark_and_fs(out)
    if fs.exists(path):
        if not overwrite or fs.isdir(path):
            raise RunDirError(f"{spark_url} already exists; add --overwrite to replace it or choose another --out")
    parent = posixpath.dirname(path)
    fs.makedirs(parent, exist_ok=True)
    token = uuid.uuid4().hex
    parts_url = f"{spark_url}.parts-{token}"
    parts_path = f"{path}.parts-{token}"
    tmp = f"{path}.tmp-{token}"
    try:
        df.orderBy(*order_by).select("value").write.text(parts_url)
        names = sorted(p for p in fs.ls(parts_path, detail=False)
                       if posixpath.basename(p).startswith("part-"))
        with fs.open(tmp, "wb") as dst:
            if header is not None:
                dst.write((header + "\n").encode("utf-8"))
            for name in names:
                with fs.open(name, "rb") as src:
                    shutil.copyfileobj(src, dst, CHUNK_BYTES)
        fs.mv(tmp, path)
        return int(fs.size(path))
    finally:
        for leftover in (tmp, parts_path):
            if fs.exists(leftover):
                fs.rm(leftover, recursive=True)


def _prepare_table_dir(out: str, kind: str, overwrite: bool) -> RunStore:
    store = RunStore(out)
    marker = store.read_json(EXPORT_MARKER) if store.exists(EXPORT_MARKER) else None
    if marker is not None:
        if not overwrite or marker.get("kind") != kind:
            raise RunDirError(f"{store.url} already holds a {marker.get('kind')} export; "
                              + ("add --overwrite to replace it" if marker.get("kind") == kind
                                 else "choose another --out directory"))
        store.remove(EXPORT_MARKER)
        for path in store.fs.ls(store.root, detail=False):
            store.fs.rm(path, recursive=True)
    elif store.exists() and store.fs.ls(store.root):
        raise RunDirError(f"{store.url} is not empty and holds no export; choose an empty or new --out directory")
    store.check_writable()
    return store


def _check_options(direction: str, fmt: str, null_token: str) -> tuple[str, ...]:
    if direction not in ("forward", "reverse", "both"):
        raise ConfigError(f"--direction must be forward, reverse or both, got {direction!r}")
    if fmt not in FORMATS:
        raise ConfigError(f"--format must be one of {', '.join(FORMATS)}, got {fmt!r}")
    if not null_token or any(ch.isspace() for ch in null_token):
        raise ConfigError(f"--null-token must be a non-empty word without spaces, got {null_token!r}")
    return ("forward", "reverse") if direction == "both" else (direction,)


def _check_null_token(spark, run_store: RunStore, null_token: str) -> None:
    """A real word spelt like the NULL token would make the tables ambiguous."""
    from pyspark.sql import functions as F

    for side in ("source", "target"):
        vocab = spark.read.parquet(run_store.spark_path("vocab", side))
        if vocab.filter(F.col("word") == null_token).limit(1).count():
            raise ConfigError(f"the {side} vocabulary has a word {null_token!r}, the token that stands for NULL; "
                              f"choose another with --null-token")


def _write_tables(store: RunStore, frames: dict[str, object], order: dict[str, list[str]], fmt: str) -> dict:
    """Write each (source, target, probability) frame as Parquet and/or TSV; returns what was written."""
    written = {}
    for direction, frame in frames.items():
        name = TABLE_NAMES[direction]
        entry = {}
        if fmt in ("parquet", "both"):
            frame.orderBy(*order[direction]).write.mode("overwrite").parquet(store.spark_path(name))
            entry["parquet"] = name
        if fmt in ("tsv", "both"):
            lines = frame.mapInArrow(_tsv_batches, "source string, target string, probability double, value string")
            write_ordered_text(lines, order[direction], store.spark_path(f"{name}.tsv"),
                               header="source\ttarget\tprobability")
            entry["tsv"] = f"{name}.tsv"
        written[direction] = entry
    return written


def _tsv_batches(batches):
    for batch in batches:
        yield pa.RecordBatch.from_arrays(
            [batch.column(0), batch.column(1), batch.column(2),
             tsv_lines(batch.column(0), batch.column(1), batch.column(2))],
            names=["source", "target", "probability", "value"])


def _order(direction: str) -> list[str]:
    """Rows grouped by conditioning word, most probable first, ties by the other word."""
    from pyspark.sql import functions as F

    cond, other = ("source", "target") if direction == "forward" else ("target", "source")
    return [F.col(cond).asc(), F.col("probability").desc(), F.col(other).asc()]


def _require_output(store: RunStore) -> dict:
    done = store.read_json("output.json")
    if done is None:
        raise CheckpointError(f"{store.url} has no committed output corpus yet (no output.json); "
                              f"wait for training to finish")
    return done


# -- links ------------------------------------------------------------------------------------
def export_links(spark, run_dir: str, out: str, *, alignment: str = "symmetrized", overwrite: bool = False,
                 log: Callable[[str], None] = print) -> dict:
    """One line of ``i-j`` links per input row, in input order; '' for filtered pairs."""
    from spark_align.engine.align import open_run

    if alignment not in ALIGNMENT_COLUMNS:
        raise ConfigError(f"--alignment must be one of {', '.join(ALIGNMENT_COLUMNS)}, got {alignment!r}")
    run = open_run(run_dir)
    done = _require_output(run.store)
    frame = spark.read.parquet(run.store.spark_path("output"))
    column = ALIGNMENT_COLUMNS[alignment]
    if column not in frame.columns:
        raise ConfigError(f"{run.store.url} was trained in the {run.config.directions} direction only; "
                          f"--alignment {alignment} is not available (use symmetrized or "
                          f"{run.config.directions})")
    started = time.time()

    def format_batches(batches):
        for batch in batches:
            yield pa.RecordBatch.from_arrays([batch.column(0), links_lines(batch.column(1))], names=["_row", "value"])

    lines = frame.select("_row", column).mapInArrow(format_batches, "_row long, value string")
    n_bytes = write_ordered_text(lines, ["_row"], out, overwrite=overwrite)
    log(f"links: {_spark_and_fs(out)[0]} ({done['rows']} lines, {n_bytes} bytes, {alignment}); "
        f"{time.time() - started:.1f}s")
    return {"lines": done["rows"], "bytes": n_bytes, "alignment": alignment, "checkpoint": done.get("checkpoint")}


# -- lexical translation tables -------------------------------------------------------------
def lexicon_frames(spark, lex, src_vocab, tgt_vocab, directions, *, min_prob: float, top_k: int,
                   null_token: str) -> dict:
    """(source, target, probability) frames per direction from a checkpoint table with word strings.

    ``lex``: (dir, src, tgt, prob) ids; ``src_vocab``/``tgt_vocab``: (word, id).
    Keeps rows with probability >= ``min_prob``, then the ``top_k`` most
    probable per conditioning word (0 = all).
    """
    from pyspark.sql import Window
    from pyspark.sql import functions as F

    null_row = spark.createDataFrame([(null_token, 0)], "word string, id int")
    src_words = src_vocab.select("word", "id").unionByName(null_row).select(
        F.col("id").alias("src"), F.col("word").alias("source"))
    tgt_words = tgt_vocab.select("word", "id").unionByName(null_row).select(
        F.col("id").alias("tgt"), F.col("word").alias("target"))
    frames = {}
    for direction in directions:
        d = 0 if direction == "forward" else 1
        rows = (lex.filter(F.col("dir") == d).filter(F.col("prob") >= min_prob)
                .join(src_words, "src").join(tgt_words, "tgt")
                .select("source", "target", F.col("prob").alias("probability")))
        if top_k:
            cond, other = ("source", "target") if direction == "forward" else ("target", "source")
            rank = F.row_number().over(Window.partitionBy(cond).orderBy(F.desc("probability"), F.asc(other)))
            rows = rows.withColumn("_rank", rank).filter(F.col("_rank") <= top_k).drop("_rank")
        frames[direction] = rows
    return frames


def export_lexicon(spark, run_dir: str, out: str, *, direction: str = "both", min_prob: float = DEFAULT_MIN_PROB,
                   top_k: int = DEFAULT_TOP_K, fmt: str = "both", checkpoint: str | None = None,
                   null_token: str = NULL_TOKEN, overwrite: bool = False,
                   log: Callable[[str], None] = print) -> dict:
    """t(target | source) and/or t(source | target) of a checkpoint, with words, pruned; written to ``out``."""
    from spark_align.engine.align import open_run, resolve_checkpoint

    directions = _check_options(direction, fmt, null_token)
    if not 0.0 <= min_prob <= 1.0:
        raise ConfigError(f"--min-prob must be between 0 and 1, got {min_prob}")
    if top_k < 0:
        raise ConfigError(f"--top-k must be 0 (no limit) or more, got {top_k}")
    run = open_run(run_dir)
    trained = run.config.direction_list
    missing = [d for d in directions if d not in trained]
    if missing:
        if direction != "both":
            raise ConfigError(f"{run.store.url} was trained in the {run.config.directions} direction only; "
                              f"--direction {direction} is not available")
        directions = trained
    ckpt = resolve_checkpoint(run, checkpoint, log)
    if "table" not in ckpt.manifest:
        raise CheckpointError(f"checkpoint {ckpt.name} holds no table (uniform start); choose a later one")
    _check_null_token(spark, run.store, null_token)
    started = time.time()
    store = _prepare_table_dir(out, "lexicon", overwrite)
    rel = RunStore.checkpoint_dir(ckpt.stage_index, ckpt.model, ckpt.iteration)
    frames = lexicon_frames(
        spark, spark.read.parquet(run.store.spark_path(rel, "lex")),
        spark.read.parquet(run.store.spark_path("vocab", "source")),
        spark.read.parquet(run.store.spark_path("vocab", "target")),
        directions, min_prob=min_prob, top_k=top_k, null_token=null_token)
    written = _write_tables(store, frames, {d: _order(d) for d in directions}, fmt)
    manifest = _commit(store, "lexicon", run, written, {
        "checkpoint": ckpt.name, "stage_index": ckpt.stage_index, "min_prob": min_prob, "top_k": top_k,
        "null_token": null_token, "format": fmt}, spark)
    log(f"lexicon: {store.url} from checkpoint {ckpt.name} (" + ", ".join(
        f"{TABLE_NAMES[d]}: {manifest['rows'][d]} entries" for d in written) + f"); {time.time() - started:.1f}s")
    return manifest


# -- lexical weighting tables -----------------------------------------------------------------
def lexical_weight_frames(aligned, *, source_column: str, target_column: str, lowercase: bool,
                          null_token: str) -> dict:
    """w(target | source) and w(source | target) from a word-aligned corpus (Koehn, Och & Marcu 2003).

    ``aligned``: rows with the two text columns and ``alignment`` (no nulls).
    With c(s, t) the number of links between words s and t (s or t NULL for
    unaligned words): w(t | s) = c(s, t) / sum_t' c(s, t'), w(s | t) =
    c(s, t) / sum_s' c(s', t). Returns {'forward': w(t|s), 'reverse': w(s|t)}
    as (source, target, probability) frames.
    """
    from pyspark.sql import Window
    from pyspark.sql import functions as F

    def count_batches(batches):
        for batch in batches:
            got = aligned_word_pairs(batch.column(0), batch.column(1), batch.column(2), lowercase)
            yield from got.to_batches()

    counts = (aligned.select(source_column, target_column, "alignment")
              .mapInArrow(count_batches, "source string, target string, n long")
              .groupBy("source", "target").agg(F.sum("n").alias("n")))
    by_source, by_target = Window.partitionBy("source"), Window.partitionBy("target")
    weights = counts.select(
        "source", "target",
        (F.col("n") / F.sum("n").over(by_source)).alias("w_fwd"),
        (F.col("n") / F.sum("n").over(by_target)).alias("w_rev"))
    named = [F.coalesce("source", F.lit(null_token)).alias("source"),
             F.coalesce("target", F.lit(null_token)).alias("target")]
    return {"forward": weights.select(*named, F.col("w_fwd").alias("probability")),
            "reverse": weights.select(*named, F.col("w_rev").alias("probability"))}


def export_lexical_weights(spark, run_dir: str, out: str, *, direction: str = "both", fmt: str = "both",
                           null_token: str = NULL_TOKEN, overwrite: bool = False,
                           log: Callable[[str], None] = print) -> dict:
    """Lexical weighting tables from the symmetrized alignment of a run's output corpus."""
    from pyspark.sql import functions as F

    from spark_align.engine.align import open_run

    directions = _check_options(direction, fmt, null_token)
    run = open_run(run_dir)
    done = _require_output(run.store)
    _check_null_token(spark, run.store, null_token)
    started = time.time()
    store = _prepare_table_dir(out, "lexical-weights", overwrite)
    c = run.config.corpus
    src_col, tgt_col = ("source", "target") if c.is_text else (c.source_column, c.target_column)
    aligned = spark.read.parquet(run.store.spark_path("output")).filter(F.col("alignment").isNotNull())
    frames = lexical_weight_frames(aligned, source_column=src_col, target_column=tgt_col, lowercase=c.lowercase,
                                   null_token=null_token)
    written = _write_tables(store, {d: frames[d] for d in directions}, {d: _order(d) for d in directions}, fmt)
    manifest = _commit(store, "lexical-weights", run, written, {
        "alignment": "alignment", "output_checkpoint": done.get("checkpoint"), "null_token": null_token,
        "format": fmt}, spark)
    log(f"lexical weights: {store.url} (" + ", ".join(
        f"{TABLE_NAMES[d]}: {manifest['rows'][d]} entries" for d in written) + f"); {time.time() - started:.1f}s")
    return manifest


def _commit(store: RunStore, kind: str, run, written: dict, details: dict, spark) -> dict:
    rows = {}
    for direction, entry in written.items():
        if "parquet" in entry:
            rows[direction] = spark.read.parquet(store.spark_path(entry["parquet"])).count()
        else:
            with store.fs.open(store.fsspec_path(entry["tsv"]), "rb") as fh:
                rows[direction] = sum(chunk.count(b"\n") for chunk in iter(lambda: fh.read(CHUNK_BYTES), b"")) - 1
    manifest = {"format_version": FORMAT_VERSION, "kind": kind, "run": run.store.url,
                "tables": {TABLE_NAMES[d]: {"direction": d, **e} for d, e in written.items()},
                "rows": rows, **details,
                "written_at": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime())}
    store.write_json(EXPORT_MARKER, manifest)
    return manifest
