"""Decoding and the output corpus: every input row and column, plus alignments.

One ``mapInArrow`` pass over the encoded blocks' row groups decodes each direction with
the same kernels that trained it, combines the directions, and emits one row
per kept pair. The rows are joined back to the corpus snapshot on ``_row``
(skipped rows get a null alignment and their ``skip_reason``) and written to
``RUN_DIR/output`` in ``_row`` order (see :func:`write_output`); ``output.json``
is written last and is the commit: it is removed before a new output is written,
so a crash mid-write never leaves an output that looks complete.
"""
from __future__ import annotations

import posixpath
import time
import uuid
from dataclasses import dataclass

import numpy as np
import pyarrow as pa

from spark_align.engine import faults
from spark_align.engine.ingest import ROW, blocks_from_batch
from spark_align.kernels import ragged
from spark_align.kernels.lookup import find
from spark_align.models.base import decode_all
from spark_align.store import FORMAT_VERSION, RunStore

LINK_SQL = "array<struct<source:int,target:int,posterior:double>>"
LINK_COLUMNS = ("alignment", "alignment_forward", "alignment_reverse")
# The decoder's rows inside the output pass: each pair's links packed into one binary value (LINK_RECORD
# per link), which Spark moves through its joins and sort as plain bytes. Nested arrays of structs cost
# far more there: converting them from Arrow, shuffling them twice and writing them with Spark's
# Parquet writer took most of the pass (see write_output).
PACKED_SCHEMA = ("_row long, alignment binary, alignment_forward binary, alignment_reverse binary, "
                 "score_forward double, score_reverse double")
LINK_RECORD = np.dtype([("source", "<i4"), ("target", "<i4"), ("posterior", "<f8")])


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


def packed_links(n_pairs: int, pair, src_i, tgt_j, post) -> pa.BinaryArray:
    """:func:`links_column`'s lists packed: one binary value per pair, its links as :data:`LINK_RECORD`s."""
    offsets = np.searchsorted(pair, np.arange(n_pairs + 1)) * LINK_RECORD.itemsize
    if offsets[-1] >= 2 ** 31:
        raise ValueError(f"{len(pair)} links are too many for one batch of packed links")
    records = np.empty(len(pair), LINK_RECORD)
    records["source"], records["target"], records["posterior"] = src_i, tgt_j, post
    return pa.Array.from_buffers(pa.binary(), n_pairs, [None, pa.py_buffer(offsets.astype(np.int32)),
                                                       pa.py_buffer(records.view(np.uint8))])


def unpacked_links(packed: pa.Array) -> pa.ListArray:
    """The lists of (source, target, posterior) structs that :func:`packed_links` packed (nulls stay null);
    ValueError if a value is not whole records."""
    if packed.type not in (pa.binary(), pa.large_binary()):
        raise ValueError(f"packed links must be binary, not {packed.type}")
    _validity, offsets_buf, data_buf = packed.buffers()
    width = np.int32 if packed.type == pa.binary() else np.int64
    offsets = np.frombuffer(offsets_buf, width, len(packed) + 1, packed.offset * np.dtype(width).itemsize)
    offsets = offsets.astype(np.int64)
    size = LINK_RECORD.itemsize
    if np.any(offsets % size != offsets[0] % size) or (offsets[-1] - offsets[0]) % size:
        raise ValueError("packed links that are not whole link records")
    data = np.frombuffer(data_buf, np.uint8) if data_buf is not None else np.zeros(0, np.uint8)
    records = data[offsets[0]:offsets[-1]].view(LINK_RECORD)
    structs = pa.StructArray.from_arrays(
        [pa.array(records["source"]), pa.array(records["target"]), pa.array(records["posterior"])],
        names=["source", "target", "posterior"])
    list_offsets = pa.array(((offsets - offsets[0]) // size).astype(np.int32))
    return pa.ListArray.from_arrays(list_offsets, structs, mask=packed.is_null() if packed.null_count else None)


def unpack_batch(batch: pa.RecordBatch) -> pa.RecordBatch:
    """``batch`` with its packed link columns (:data:`LINK_COLUMNS`, binary) as lists of structs."""
    columns = [unpacked_links(col) if name in LINK_COLUMNS and col.type in (pa.binary(), pa.large_binary()) else col
               for name, col in zip(batch.schema.names, batch.columns)]
    return pa.RecordBatch.from_arrays(columns, names=batch.schema.names)


def _csr(n_pairs: int, links) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    pair, src_i, tgt_j = links[0], links[1], links[2]
    offsets = np.searchsorted(pair, np.arange(n_pairs + 1)).astype(np.int64)
    return offsets, src_i.astype(np.int32), tgt_j.astype(np.int32)


def _link_key(pair, src_i, tgt_j) -> np.ndarray:
    return (pair.astype(np.int64) << 40) | (src_i.astype(np.int64) << 20) | tgt_j.astype(np.int64)


def mean_posterior(links, dense_fwd, dense_rev) -> np.ndarray:
    """Average of the two directions' posteriors of each link (0 where a direction gives none)."""
    total = np.zeros(len(links[0]))
    for dense in (dense_fwd, dense_rev):
        merged = ragged.values_at_links(*links[:3], *dense[:4], 0.0)
        if merged is None:  # not both in link order: search
            key, dkey = _link_key(*links[:3]), _link_key(*dense[:3])
            order = np.argsort(dkey)
            merged = find(dkey[order], dense[3][order], key, 0.0)[2]
        total += merged
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
                 threshold: float, symmetrization: str) -> "Decoder":
    """The decoder of a model with its tables (``tables_bc.value``: direction -> table) and dense
    parameters; see :class:`Decoder`."""
    return Decoder(model, tuple(directions), tables_bc, dense, method, threshold, symmetrization)


@dataclass(frozen=True, eq=False)
class Decoder:
    """Decodes blocks into output rows. ``decoder(batches, hints=None, *, packed=False)`` gives the rows
    of blocks (Arrow batches of ``encoded/blocks`` rows), and ``decoder.unit(fs, path, row_group, stored,
    *, packed)`` those of one row group of a blocks file with its stored hints (``stored``: direction ->
    ``lookup.StoredHints``), taking the positions as they are where the E-step would
    (``engine.estep.hints_exact_for``): then neither the blocks' dictionary keys (40% of a row group's
    bytes) are read nor each key checked in the table. Shipped to the tasks that decode."""

    model: object
    directions: tuple[str, ...]
    tables_bc: object
    dense: dict
    method: str
    threshold: float
    symmetrization: str

    def __call__(self, batches, hints: dict | None = None, *, packed: bool = False):
        """Decoder rows for blocks (:data:`PACKED_SCHEMA`, with the link columns as :data:`LINK_SQL`
        lists unless ``packed``);
        ``hints``: direction -> stored lookup hints of these blocks' dictionaries, concatenated in
        block order (``engine.hints``, a ``lookup.StoredHints``; checked, so never trusted). Hints
        found in other keys than the table's are not used: the table's hash index finds the keys
        faster than checking mostly stale hints first."""
        blocks = ((rows, block) for batch in batches for _block_id, rows, block in blocks_from_batch(batch))
        yield from self._decode_blocks(blocks, hints or {}, {}, packed)

    def unit(self, fs, path: str, row_group: int, stored: dict, *, packed: bool = False):
        from spark_align.engine.estep import E_STEP_COLUMNS, hints_exact_for
        from spark_align.engine.mstep import read_unit
        from spark_align.engine.tables import MIN_PROB
        from spark_align.kernels.lookup import gather_found

        tables = self.tables_bc.value
        trusted = [d for d in self.directions if hints_exact_for(stored.get(d), tables[d])]
        without_keys = ["rows"] + [c for c in E_STEP_COLUMNS if c != "dict_keys"]

        def read(columns):
            return [(rows, block) for batch in read_unit(fs, path, row_group, columns=columns)
                    for _block_id, rows, block in blocks_from_batch(batch)]

        blocks = read(without_keys if len(trusted) == len(self.directions) else None)
        sizes = [block.n_dict for _rows, block in blocks]
        found = {d: gather_found(tables[d].probs, stored[d].points, stored[d].found, sizes, MIN_PROB)
                 for d in trusted}
        found = {d: probs for d, probs in found.items() if probs is not None}
        if len(found) < len(self.directions) and blocks and blocks[0][1].dict_keys is None:
            blocks = read(None)  # a direction's positions were not what a search gives: searched instead
        yield from self._decode_blocks(blocks, stored, found, packed)

    def _decode_blocks(self, blocks, hints: dict, found: dict, packed: bool):
        # found: direction -> the probabilities of every dictionary key of these blocks, in block order
        directions = self.directions
        column = packed_links if packed else links_column
        tables = self.tables_bc.value
        offset = 0
        for rows, block in blocks:
            n = block.n_pairs
            n_keys = block.n_dict
            links, every, scores = {}, {}, {}
            for direction in directions:
                view = block.view(direction)
                if direction in found:
                    t_local = found[direction][offset:offset + n_keys]
                else:
                    h = hints.get(direction)
                    h = (h.points[offset:offset + n_keys] if h is not None and offset + n_keys <= len(h.points)
                         and h.keys_id == tables[direction].keys_id else None)
                    t_local = tables[direction].find_hinted(block.dict_keys, h)[1]
                chosen, all_links, loglik = decode_all(
                    self.model, view, t_local, self.dense[direction], method=self.method, threshold=self.threshold,
                    every_threshold=ALL_LINKS_THRESHOLD if len(directions) == 2 else None)
                links[direction] = directional_links(block, direction, *chosen)
                if all_links is not None:
                    every[direction] = directional_links(block, direction, *all_links)
                scores[direction] = loglik / np.maximum(view.gen_len, 1)
            if len(directions) == 2:
                sym = combine(block, links["forward"], links["reverse"], every["forward"], every["reverse"],
                              self.symmetrization, self.threshold)
            else:
                sym = links[directions[0]]
            offset += n_keys
            empty = (np.zeros(0, np.int64),) * 3 + (np.zeros(0),)
            nan = np.full(n, np.nan)
            yield pa.RecordBatch.from_arrays([
                pa.array(rows),
                column(n, *sym),
                column(n, *links.get("forward", empty)),
                column(n, *links.get("reverse", empty)),
                pa.array(scores.get("forward", nan)),
                pa.array(scores.get("reverse", nan)),
            ], names=["_row", "alignment", "alignment_forward", "alignment_reverse",
                      "score_forward", "score_reverse"])


UNITS_PER_CORE = 4  # decoding tasks per core: several, so the cores stay busy to the end


def decode_units(decoder, blocks_url: str, hints_url: str | None = None, directions: tuple[str, ...] = ()):
    """``mapInArrow`` function: (path, row_group) rows -> the decoder's packed rows for those row groups of
    encoded blocks, read with pyarrow through fsspec (as the E-step reads them), with the row groups'
    stored lookup hints under ``hints_url`` where there are any (the last E-step's, for the same keys)."""

    def decode(batches):
        import fsspec

        from spark_align.engine import hints
        from spark_align.engine.tables import keep_freed_memory

        keep_freed_memory()
        fs, _root = fsspec.core.url_to_fs(blocks_url)
        hints_fs, hints_root = fsspec.core.url_to_fs(hints_url) if hints_url else (None, None)
        for batch in batches:
            for path, row_group in zip(batch.column(0).to_pylist(), batch.column(1).to_pylist()):
                stored = {} if hints_fs is None else {
                    d: hints.read(hints_fs, hints_root, d, path, row_group) for d in directions}
                yield from decoder.unit(fs, path, row_group, {d: h for d, h in stored.items() if h is not None},
                                        packed=True)

    return decode


OUTPUT_WRITER_CONF = "spark.spark_align.outputWriter"  # "arrow" (the default) or "spark"
OUTPUT_WRITERS = ("arrow", "spark")
FILE_BYTES = 64 << 20  # the Arrow writer's files: about this much data in memory each
MAX_FILE_ROWS = 1 << 16  # and at most this many rows
ROW_BYTES_PER_SNAPSHOT_BYTE = 10  # an output row in memory, per byte of its snapshot row on disk (estimate)


def output_writer(spark, schema) -> str:
    """Which writer the output pass uses: ``arrow`` (:func:`make_group_writer`) unless
    :data:`OUTPUT_WRITER_CONF` says ``spark`` or the corpus has a column type Spark cannot hand to
    Python as Arrow, where Spark's own writer does it."""
    from pyspark.sql.pandas.types import to_arrow_schema

    from spark_align.errors import ConfigError

    wanted = spark.conf.get(OUTPUT_WRITER_CONF, "arrow")
    if wanted not in OUTPUT_WRITERS:
        raise ConfigError(f"{OUTPUT_WRITER_CONF} must be one of {', '.join(OUTPUT_WRITERS)}, not {wanted!r}")
    if wanted == "arrow":
        try:
            to_arrow_schema(schema, timezone=spark.conf.get("spark.sql.session.timeZone"))
        except Exception:  # noqa: BLE001 - any type the Arrow conversion refuses
            return "spark"
    return wanted


def file_shift(n_rows: int, snapshot_bytes: int) -> int:
    """log2 of the rows per output file (:func:`make_group_writer`): about :data:`FILE_BYTES` of rows in
    memory, at most :data:`MAX_FILE_ROWS`. A row is taken as :data:`ROW_BYTES_PER_SNAPSHOT_BYTE` times
    its share of the snapshot's bytes on disk: the decoded links grow with the tokens as the text does
    (measured at 1M generated pairs: 113 bytes on disk, 1,040 in the output table, 830 of them links)."""
    per_row = ROW_BYTES_PER_SNAPSHOT_BYTE * snapshot_bytes / max(n_rows, 1) + 64
    rows = max(1, min(MAX_FILE_ROWS, int(FILE_BYTES // per_row)))
    return rows.bit_length() - 1


def make_group_writer(output_url: str):
    """The output pass's last step, for ``cogroup(...).applyInArrow``: the snapshot rows of one group of
    consecutive ``_row`` values and the decoded (packed) and skipped rows of the same group -> their
    left join in ``_row`` order, the links as lists of structs, written as one Parquet file
    ``part-GGGGGGGGGGGG.parquet`` (G the group, in hex: file names sort as the rows do) with pyarrow
    through fsspec, under ``_temporary`` first and then moved into place (so a retried task overwrites
    a whole file). Returns one summary row (group, rows).

    The columns are those of Spark's join: ``_row``, the snapshot's, the decoded ones, ``skip_reason``.
    RuntimeError if a decoded or skipped row has no snapshot row, or two share a ``_row``: nothing is
    dropped silently.
    """

    def write(key, snapshot: pa.Table, decoded: pa.Table) -> pa.Table:
        import fsspec
        import pyarrow.parquet as pq

        from spark_align.engine.tables import keep_freed_memory
        from spark_align.store import ensure_parent

        keep_freed_memory()
        group = key[0].as_py()
        snapshot = snapshot.drop_columns([GROUP]).sort_by(ROW)
        decoded = decoded.drop_columns([GROUP]).sort_by(ROW)
        rows, found = snapshot.column(ROW).to_numpy(), decoded.column(ROW).to_numpy()
        if len(found) > 1 and bool(np.any(found[1:] == found[:-1])):
            raise RuntimeError(f"output group {group}: two decoded or skipped rows share a {ROW}")
        at = np.minimum(np.searchsorted(found, rows), max(len(found) - 1, 0))
        hit = found[at] == rows if len(found) else np.zeros(len(rows), bool)
        if int(hit.sum()) != len(found):
            raise RuntimeError(f"output group {group}: {len(found) - int(hit.sum())} decoded or skipped row(s) "
                               f"without a snapshot row")
        take = pa.array(at, mask=~hit)
        names = [ROW] + [name for name in snapshot.column_names if name != ROW]
        columns = [snapshot.column(name) for name in names]
        for name in decoded.column_names:
            if name != ROW:
                column = decoded.column(name).take(take).combine_chunks()
                columns.append(unpacked_links(column) if name in LINK_COLUMNS else column)
                names.append(name)
        table = pa.Table.from_arrays(columns, names=names)
        fs, root = fsspec.core.url_to_fs(output_url)
        name = f"part-{group:012x}.parquet"
        tmp = posixpath.join(root, "_temporary", f"{name}.{uuid.uuid4().hex}")
        ensure_parent(fs, tmp)
        with fs.open(tmp, "wb") as fh:
            pq.write_table(table, fh, compression="snappy", use_dictionary=dictionary_columns(table))
        fs.mv(tmp, posixpath.join(root, name))
        return pa.table({"group": pa.array([group], pa.int64()), "rows": pa.array([len(rows)], pa.int64())})

    return write


def dictionary_columns(table: pa.Table) -> list[str]:
    """The Parquet leaf columns of an output file worth a dictionary: every one but those the engine
    fills with values that hardly repeat (``_row``, the scores, the links' posteriors), where trying a
    dictionary first only costs time. Writing 32,768 rows after Model 1 at 1M pairs: 0.11 s against
    0.15 s with a dictionary tried everywhere, and 18 MB against 19. The corpus's own columns keep
    theirs, as Spark's writer gives them."""
    import pyarrow.parquet as pq

    sink = pa.BufferOutputStream()
    pq.write_table(table.schema.empty_table(), sink)  # the leaf paths, as the writer names them
    schema = pq.read_metadata(pa.BufferReader(sink.getvalue())).schema
    unique = {ROW, "score_forward", "score_reverse"}
    leaves = (schema.column(i).path for i in range(len(schema)))
    return [p for p in leaves
            if p not in unique and not (p.split(".")[0] in LINK_COLUMNS and p.endswith(".posterior"))]


GROUP = "_output_group"  # the output pass's grouping column (never written)


def write_output(spark, store: RunStore, decoder, *, checkpoint: str, directions, extra: dict,
                 decoded=None) -> dict:
    """Decode the store's ``encoded/blocks``, join to the snapshot, write ``RUN_DIR/output`` and commit
    ``output.json``.

    Decoding tasks get row groups of blocks (``engine.mstep.block_units``), several per core, rather
    than Spark's file splits (three tasks for 100k pairs, so one core sat idle for a third of the pass).
    Their rows carry each pair's links packed in one binary value (:data:`PACKED_SCHEMA`). The snapshot
    rows and the decoded and skipped rows meet in groups of consecutive ``_row`` values (a cogroup:
    one shuffle of each side, no global sort), and each group is joined and written as one file with
    pyarrow (:func:`make_group_writer`). Measured at 1M pairs (local[2]), from decoded rows already
    written: 10.0 s, against 19.6 s for Spark's join, sort by ``_row`` and the same pyarrow writer, and
    Spark's Parquet writer alone took 10 s for the decoded link columns. Where Spark cannot hand the
    corpus's columns to Python (:func:`output_writer`), the links are unpacked, joined and sorted by
    Spark and written by its own writer, as before. ``decoded``: the decoded rows already made
    (``engine.shipping.decode_routed``, for tables no Python worker should hold whole); ``decoder`` is
    then not used.
    """
    from pyspark.sql import functions as F

    from spark_align.engine.mstep import block_units
    from spark_align.store import fsspec_url

    store.remove("output.json")
    if decoded is None:
        units = block_units(store)
        sc = spark.sparkContext
        units_df = sc.parallelize(units, max(1, min(len(units), UNITS_PER_CORE * sc.defaultParallelism))).toDF(
            "path string, row_group int")
        decoded = units_df.mapInArrow(decode_units(decoder, fsspec_url(store.spark_path("encoded", "blocks")),
                                                   fsspec_url(store.spark_path("encoded", "hints")),
                                                   tuple(directions)), PACKED_SCHEMA)
    if len(directions) == 1:
        other = "alignment_reverse" if directions[0] == "forward" else "alignment_forward"
        decoded = decoded.drop(other, "score_reverse" if directions[0] == "forward" else "score_forward")
    snapshot = spark.read.parquet(store.spark_path("corpus"))
    skipped = spark.read.parquet(store.spark_path("encoded", "skipped"))
    writer = output_writer(spark, snapshot.schema)
    started = time.time()
    ckpt_model, _, ckpt_iter = checkpoint.partition(":")
    store.remove("output")
    with faults.kill_during_write("output-write", ckpt_model, ckpt_iter, store.spark_path("output")):
        if writer == "spark":
            out = snapshot.join(_unpacked(decoded), on=ROW, how="left").join(skipped, on=ROW, how="left")
            out.orderBy(ROW).write.mode("overwrite").parquet(store.spark_path("output"))
        else:
            shift = file_shift(snapshot.count(), sum(store.files("corpus").values()))
            others = decoded.withColumn("skip_reason", F.lit(None).cast("string")).unionByName(
                skipped, allowMissingColumns=True)
            groups = [frame.withColumn(GROUP, F.shiftright(ROW, shift)).groupBy(GROUP) for frame in (snapshot, others)]
            # The snapshot has rows (ingestion refuses an empty corpus), so some group writes a file.
            groups[0].cogroup(groups[1]).applyInArrow(
                make_group_writer(fsspec_url(store.spark_path("output"))), "group long, rows long").collect()
            store.remove("output", "_temporary")  # what failed task attempts left
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
        "writer": writer,
        **extra,
    }
    store.write_json("output.json", manifest, kill_point=("output-commit", ckpt_model, ckpt_iter))
    return manifest


def _unpacked(frame):
    """``frame`` with its packed link columns as the lists of structs they hold (:func:`unpack_batch`)."""
    from pyspark.sql.types import StructField, StructType, _parse_datatype_string

    nested = _parse_datatype_string(LINK_SQL)
    schema = StructType([StructField(f.name, nested, True) if f.name in LINK_COLUMNS else f
                         for f in frame.schema.fields])
    return frame.mapInArrow(lambda batches: (unpack_batch(b) for b in batches), schema)
