"""Decoding and the output corpus: every input row and column, plus alignments.

One ``mapInArrow`` pass over the encoded blocks' row groups decodes each direction with
the same kernels that trained it, combines the directions, and emits one row
per kept pair. The rows are joined back to the corpus snapshot on ``_row``
(skipped rows get a null alignment and their ``skip_reason``) and written to
``RUN_DIR/output``; ``output.json`` is written last and is the commit: it is
removed before a new output is written, so a crash mid-write never leaves an
output that looks complete.
"""
from __future__ import annotations

import time

import numpy as np
import pyarrow as pa

from spark_align.engine import faults
from spark_align.engine.ingest import ROW, blocks_from_batch
from spark_align.kernels import ragged
from spark_align.kernels.lookup import find
from spark_align.models.base import decode_all
from spark_align.store import FORMAT_VERSION, RunStore

LINK_TYPE = pa.list_(pa.struct([("source", pa.int32()), ("target", pa.int32()), ("posterior", pa.float64())]))
LINK_SQL = "array<struct<source:int,target:int,posterior:double>>"
DECODED_SCHEMA = (f"_row long, alignment {LINK_SQL}, alignment_forward {LINK_SQL}, "
                  f"alignment_reverse {LINK_SQL}, score_forward double, score_reverse double")


def directional_links(block: ragged.Block, direction: str, token, cond_pos, post):
    """Chosen links of one direction as flat (pair, source index, target index, posterior), sorted."""
    forward = direction == "forward"
    ordered = ragged.links_by_pair(block.tgt_offsets if forward else block.src_offsets, token, cond_pos, post,
                                   forward=forward)
    if ordered is not None:
        return ordered
    # Links not given token-major (none of the decoders gives them otherwise): pairs per token, then a sort.
    pair = ragged.row_of(block.tgt_offsets if forward else block.src_offsets)[token]
    if forward:  # generated = target tokens, cond = source positions
        src_i, tgt_j = cond_pos - 1, token - block.tgt_offsets[pair]
    else:
        src_i, tgt_j = token - block.src_offsets[pair], cond_pos - 1
    order = np.argsort(_link_key(pair, src_i, tgt_j), kind="stable")
    return pair[order], src_i[order], tgt_j[order], post[order]


def links_column(n_pairs: int, pair, src_i, tgt_j, post) -> pa.ListArray:
    """Per-pair lists of (source, target, posterior) structs from flat sorted links."""
    offsets = np.searchsorted(pair, np.arange(n_pairs + 1)).astype(np.int32)
    structs = pa.StructArray.from_arrays(
        [pa.array(src_i.astype(np.int32)), pa.array(tgt_j.astype(np.int32)), pa.array(post.astype(np.float64))],
        names=["source", "target", "posterior"])
    return pa.ListArray.from_arrays(pa.array(offsets), structs)


def _csr(n_pairs: int, links) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    pair, src_i, tgt_j = links[0], links[1], links[2]
    offsets = np.searchsorted(pair, np.arange(n_pairs + 1)).astype(np.int64)
    return offsets, src_i.astype(np.int32), tgt_j.astype(np.int32)


def _link_key(pair, src_i, tgt_j) -> np.ndarray:
    return (pair.astype(np.int64) << 40) | (src_i.astype(np.int64) << 20) | tgt_j.astype(np.int64)


def mean_posterior(links, dense_fwd, dense_rev) -> np.ndarray:
    """Average of the two directions' posteriors of each link (0 where a direction gives none)."""
    key = _link_key(*links[:3])
    total = np.zeros(len(key))
    for dense in (dense_fwd, dense_rev):
        dkey = _link_key(*dense[:3])
        order = np.argsort(dkey)
        total += find(dkey[order], dense[3][order], key, 0.0)[2]
    return total / 2.0


def combine(block: ragged.Block, fwd, rev, fwd_all, rev_all, method: str, threshold: float):
    """Combine the two directions' links of every pair of a block (flat sorted arrays in and out).

    ``fwd``/``rev`` are each direction's chosen links, ``fwd_all``/``rev_all`` every
    link with a non-negligible posterior. The posterior stored with a combined link
    is the mean of its two directional posteriors.
    """
    from spark_align import symmetrize

    n = block.n_pairs
    src_len, tgt_len = ragged.lengths(block.src_offsets), ragged.lengths(block.tgt_offsets)
    if method == "posterior":
        got = symmetrize.combine_posteriors_batch(
            (*_csr(n, fwd_all), fwd_all[3]), (*_csr(n, rev_all), rev_all[3]),
            n_src=src_len, n_tgt=tgt_len, threshold=threshold)
        pair = ragged.row_of(got.offsets)
        return pair, got.src_index.astype(np.int64), got.tgt_index.astype(np.int64), got.posterior
    got = symmetrize.symmetrize_batch(_csr(n, fwd), _csr(n, rev), n_src=src_len, n_tgt=tgt_len, method=method)
    pair = ragged.row_of(got.offsets)
    links = (pair, got.src_index.astype(np.int64), got.tgt_index.astype(np.int64))
    return (*links, mean_posterior(links, fwd_all, rev_all))


ALL_LINKS_THRESHOLD = 1e-4  # posteriors below this count as 0 when directions are averaged


def make_decoder(model, directions: tuple[str, ...], tables_bc, dense: dict, *, method: str,
                 threshold: float, symmetrization: str):
    def decode(batches, hints: dict | None = None):
        """Decoder rows for blocks; ``hints``: direction -> stored lookup hints of these blocks'
        dictionaries, concatenated in block order (``engine.hints``, a ``lookup.StoredHints``; checked,
        so never trusted). Hints found in other keys than the table's are not used: the table's hash
        index finds the keys faster than checking mostly stale hints first."""
        tables = tables_bc.value
        offset = 0
        for batch in batches:
            for _block_id, rows, block in blocks_from_batch(batch):
                n = block.n_pairs
                n_keys = len(block.dict_keys)
                links, every, scores = {}, {}, {}
                for direction in directions:
                    view = block.view(direction)
                    h = (hints or {}).get(direction)
                    h = (h.points[offset:offset + n_keys] if h is not None and offset + n_keys <= len(h.points)
                         and h.keys_id == tables[direction].keys_id else None)
                    t_local = tables[direction].find_hinted(block.dict_keys, h)[1]
                    chosen, all_links, loglik = decode_all(
                        model, view, t_local, dense[direction], method=method, threshold=threshold,
                        every_threshold=ALL_LINKS_THRESHOLD if len(directions) == 2 else None)
                    links[direction] = directional_links(block, direction, *chosen)
                    if all_links is not None:
                        every[direction] = directional_links(block, direction, *all_links)
                    scores[direction] = loglik / np.maximum(view.gen_len, 1)
                if len(directions) == 2:
                    sym = combine(block, links["forward"], links["reverse"], every["forward"], every["reverse"],
                                  symmetrization, threshold)
                else:
                    sym = links[directions[0]]
                offset += n_keys
                empty = (np.zeros(0, np.int64),) * 3 + (np.zeros(0),)
                nan = np.full(n, np.nan)
                yield pa.RecordBatch.from_arrays([
                    pa.array(rows),
                    links_column(n, *sym),
                    links_column(n, *links.get("forward", empty)),
                    links_column(n, *links.get("reverse", empty)),
                    pa.array(scores.get("forward", nan)),
                    pa.array(scores.get("reverse", nan)),
                ], names=["_row", "alignment", "alignment_forward", "alignment_reverse",
                          "score_forward", "score_reverse"])

    return decode


UNITS_PER_CORE = 4  # decoding tasks per core: several, so the cores stay busy to the end


def decode_units(decoder, blocks_url: str, hints_url: str | None = None, directions: tuple[str, ...] = ()):
    """``mapInArrow`` function: (path, row_group) rows -> the decoder's rows for those row groups of
    encoded blocks, read with pyarrow through fsspec (as the E-step reads them), with the row groups'
    stored lookup hints under ``hints_url`` where there are any (the last E-step's, for the same keys)."""

    def decode(batches):
        import fsspec

        from spark_align.engine import hints
        from spark_align.engine.mstep import read_unit
        from spark_align.engine.tables import keep_freed_memory

        keep_freed_memory()
        fs, _root = fsspec.core.url_to_fs(blocks_url)
        hints_fs, hints_root = fsspec.core.url_to_fs(hints_url) if hints_url else (None, None)
        for batch in batches:
            for path, row_group in zip(batch.column(0).to_pylist(), batch.column(1).to_pylist()):
                stored = {} if hints_fs is None else {
                    d: hints.read(hints_fs, hints_root, d, path, row_group) for d in directions}
                yield from decoder(read_unit(fs, path, row_group),
                                   {d: h for d, h in stored.items() if h is not None})

    return decode


def write_output(spark, store: RunStore, decoder, *, checkpoint: str, directions, extra: dict) -> dict:
    """Decode the store's ``encoded/blocks``, join to the snapshot, write ``RUN_DIR/output`` and commit
    ``output.json``.

    Decoding tasks get row groups of blocks (``engine.mstep.block_units``), several per core, rather
    than Spark's file splits (three tasks for 100k pairs, so one core sat idle for a third of the pass).
    """
    from pyspark.sql import functions as F

    from spark_align.engine.mstep import block_units
    from spark_align.store import fsspec_url

    store.remove("output.json")
    units = block_units(store)
    sc = spark.sparkContext
    units_df = sc.parallelize(units, max(1, min(len(units), UNITS_PER_CORE * sc.defaultParallelism))).toDF(
        "path string, row_group int")
    decoded = units_df.mapInArrow(decode_units(decoder, fsspec_url(store.spark_path("encoded", "blocks")),
                                               fsspec_url(store.spark_path("encoded", "hints")), tuple(directions)),
                                  DECODED_SCHEMA)
    if len(directions) == 1:
        other = "alignment_reverse" if directions[0] == "forward" else "alignment_forward"
        decoded = decoded.drop(other, "score_reverse" if directions[0] == "forward" else "score_forward")
    snapshot = spark.read.parquet(store.spark_path("corpus"))
    skipped = spark.read.parquet(store.spark_path("encoded", "skipped"))
    out = (snapshot.join(decoded, on=ROW, how="left").join(skipped, on=ROW, how="left")
           .orderBy(ROW))
    started = time.time()
    ckpt_model, _, ckpt_iter = checkpoint.partition(":")
    with faults.kill_during_write("output-write", ckpt_model, ckpt_iter, store.spark_path("output")):
        out.write.mode("overwrite").parquet(store.spark_path("output"))
    written = spark.read.parquet(store.spark_path("output"))
    counts = written.agg(F.count("*").alias("rows"),
                         F.count("alignment").alias("aligned"),
                         F.count("skip_reason").alias("skipped")).collect()[0]
    manifest = {
        "format_version": FORMAT_VERSION,
        "checkpoint": checkpoint,
        "rows": counts["rows"], "aligned": counts["aligned"], "skipped": counts["skipped"],
        "files": store.files("output"),
        "seconds": time.time() - started,
        **extra,
    }
    store.write_json("output.json", manifest, kill_point=("output-commit", ckpt_model, ckpt_iter))
    return manifest
