"""From E-step counts to the committed table: exact, in numpy, with Spark only moving bytes.

Per iteration:

1. Each E-step task (either shipping path) folds the rows of all its blocks
   into one sum per distinct (dir, src, tgt) (table-aligned accumulators, or a
   :class:`~spark_align.kernels.counts.HashCounts`; integer fixed point) and emits one record per reducer bucket:
   ``(bucket, payload bytes)`` (``kernels.counts.encode_rows``). A task's output
   is then at most the number of distinct pairs it saw, not one row per block
   entry.
2. Spark's shuffle moves those records as opaque bytes (``RDD.partitionBy``
   with the bucket as partition), so every row of one conditioning word (and
   every entry of one dense statistic) meets in one reducer task.
3. Reducer task ``p`` sums its rows exactly, normalises per conditioning word
   (``kernels.counts.normalise``), optionally prunes, and writes
   ``lex/part-PPPPP.parquet`` itself with pyarrow through fsspec: first under
   ``lex/_temporary/`` and then moved into place, so a retried task overwrites
   a whole file with the same bytes. It returns only small sums to the driver:
   dense statistics, scalars, entry counts and what pruning removed.

An iteration whose E-step is one task skips 2 and 3's shuffle: that task
groups its sums by bucket and writes every bucket's file itself
(:func:`write_task_table`), the same bytes as the reducers.

Nothing table-sized passes through the JVM's SQL engine or the driver. The
number of reducers is ``spark.sql.shuffle.partitions``; results do not depend
on it (integer sums), only the number of files does.
"""
from __future__ import annotations

import posixpath
import time
import uuid
import zlib

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
from fsspec.implementations.local import LocalFileSystem

from spark_align.engine.estep import DENSE, HI_SCALE, LO_SCALE, SCALAR, note_task_memory, to_fixed
from spark_align.engine.tables import (BUCKET_META, BUCKETS_META, DIRS, KEYS_META, keep_freed_memory, keys_digest,
                                       map_threads, worker_scratch)
from spark_align.kernels import counts
from spark_align.store import ensure_parent

TABLE_SCHEMA = pa.schema([("dir", pa.int8()), ("src", pa.int32()), ("tgt", pa.int32()), ("prob", pa.float64())])


def fold_rows(buffer: counts.CountBuffer | counts.HashCounts, dirs, src, tgt, hi, lo) -> None:
    """Add E-step rows (``engine.estep`` layout, already fixed point) to a task's buffer."""
    if len(src) and (int(src.max()) >= counts.MAX_ID or int(tgt.max()) >= counts.MAX_ID):
        raise ValueError(f"word ids must stay below {counts.MAX_ID}")
    buffer.add(counts.row_keys(dirs, src, tgt), np.asarray(hi, np.int64), np.asarray(lo, np.int64))


def payloads(buffer: counts.CountBuffer | counts.HashCounts, n_buckets: int):
    """(bucket, bytes) records of a task's folded rows: one per non-empty bucket."""
    yield from sorted(counts.encode_by_bucket(*buffer.result(), n_buckets).items())


_SPARE_SLOTS = "spare hash slots"  # worker_scratch entry: the last E-step task's emptied HashCounts table


class TaskCounts:
    """One E-step task's counts, folded exactly as they arrive.

    Lexical counts of keys the whole table holds are added into integer accumulators aligned with
    the table (positions come from the lookup the E-step does anyway), so folding costs one
    scattered add per dictionary entry and no sort; everything else (the constant first-iteration
    table, keys absent from the table, dense statistics, scalars) goes through a
    :class:`~spark_align.kernels.counts.HashCounts`. Memory: 17 bytes per table entry per direction
    that has a table, on top of the table itself.
    """

    def __init__(self, tables: dict, *, reuse: bool = False, slot: int = 0) -> None:
        """``reuse``: start from, and leave behind, the hash table of the Python worker's previous task
        with the same table (``engine.tables.worker_scratch``), as the accumulators are; for the
        E-step's counts (the first iteration folds every count in it), not for a few scalar rows.
        ``slot``: which of the worker's spare sets to take and leave (one per thread of a task)."""
        self.tables = tables
        self.reuse = reuse
        self.slot = slot
        self.buffer = counts.HashCounts(slots=worker_scratch().pop((_SPARE_SLOTS, slot), None) if reuse else None)
        self.acc: dict[int, tuple[np.ndarray, np.ndarray, np.ndarray]] = {}
        self._buffered: tuple | None = None  # the buffer's rows grouped by bucket (bucket_sums)

    def add(self, dict_keys: np.ndarray, found, d: int, emitted: np.ndarray, values: np.ndarray, other) -> None:
        """One block's result for direction ``d`` (``engine.estep.block_results``); ``found`` = the
        table's ``positions`` of ``dict_keys`` (None: constant table). ``dict_keys`` may be None when
        every emitted entry was found (stored positions taken as they are, ``engine.hints``)."""
        if found is None:
            keys, values = dict_keys[emitted], values[emitted]
        else:
            acc = self._acc(d)
            # dictionary keys are unique, so no position repeats within a block
            miss = counts.add_at_positions(found[0], found[1], emitted, values, acc[0], acc[1],
                                           hi_scale=HI_SCALE, lo_scale=LO_SCALE)
            if len(miss) and dict_keys is None:
                raise RuntimeError("counts of keys absent from the table, in a block read without its keys")
            keys, values = (dict_keys[miss], values[miss]) if len(miss) else ((), ())
        if len(keys):
            self.buffer.add(*counts.pair_rows(d, keys, values, hi_scale=HI_SCALE, lo_scale=LO_SCALE))
        self.add_rows(d, *other)

    def add_rows(self, d: int, src: np.ndarray, tgt: np.ndarray, values: np.ndarray) -> None:
        fold_rows(self.buffer, np.full(len(src), d, np.int8), src, tgt, *to_fixed(values))

    def _acc(self, d: int):
        if d not in self.acc:
            table = self.tables[DIRS[d]]
            n = len(table.keys)
            spare = worker_scratch().pop(("spare accumulators", d, self.slot), None)
            if spare is None or len(spare[1]) != n:
                spare = (np.zeros((n, 2), np.int64), np.zeros(n, bool))
            self.acc[d] = (*spare, table.keys)
        return self.acc[d]

    def _release(self) -> None:
        """Zero the accumulators and keep them for the Python worker's next task with the same table
        (``engine.tables.worker_scratch``): a fresh 75 MB array cost up to 0.1 s of page faults on first
        touch, zeroing it again 0.01 s."""
        for d, (acc, touched, _keys) in self.acc.items():
            acc.fill(0)
            touched.fill(False)
            worker_scratch()[("spare accumulators", d, self.slot)] = (acc, touched)
        self.acc = {}
        slots = self.buffer.release()
        if self.reuse:
            worker_scratch()[(_SPARE_SLOTS, self.slot)] = slots

    def merge(self, other: "TaskCounts") -> None:
        """Add ``other``'s counts (over the same tables) into this one; ``other`` is left empty."""
        for d, (acc, touched, _keys) in other.acc.items():
            mine = self._acc(d)
            np.add(mine[0], acc, out=mine[0])
            np.logical_or(mine[1], touched, out=mine[1])
        keys, hi, lo = other.buffer.result()
        self.buffer.add(keys, hi, lo)
        other._release()

    def rows(self) -> list[tuple[np.ndarray, np.ndarray, np.ndarray]]:
        """Every count added so far as (row key, hi, lo) runs of ascending keys: the lexical counts of
        every direction's accumulators in one run (directions order the keys first), the rest in
        another; afterwards the accumulators are empty again, as after :meth:`payloads`."""
        lexical = [counts.touched_rows(touched, keys, d, acc) for d, (acc, touched, keys) in sorted(self.acc.items())]
        runs = [tuple(np.concatenate(parts) for parts in zip(*lexical))] if lexical else []
        runs.append(self.buffer.result())
        self._release()
        return runs

    def payloads(self, n_buckets: int):
        """(bucket, bytes) records: every count of this task, one record per non-empty bucket."""
        by_bucket: dict[int, list[bytes]] = {}
        for bucket, data in payloads(self.buffer, n_buckets):
            by_bucket.setdefault(bucket, []).append(data)
        for d, (acc, touched, table_keys) in sorted(self.acc.items()):
            # Cost follows the table (sequential passes) and the entries this task touched. Not in
            # threads, one per direction: that took 0.66 s against 0.44 s in turn (1M pairs, 2 cores).
            for bucket, segment in counts.encode_touched(touched, table_keys, d, n_buckets, acc).items():
                by_bucket.setdefault(bucket, []).append(segment)
        self._release()
        for bucket in sorted(by_bucket):
            yield bucket, b"".join(by_bucket[bucket])

    def bucket_sums(self, bucket: int, n_buckets: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Bucket ``bucket``'s counts (``counts.buckets_of``) summed per key: (keys ascending and
        distinct, hi, lo), what a reducer that received only this task's :meth:`payloads` folds. Leaves
        the counts in place (threads may take buckets at once, once :meth:`group_buffer` has run);
        :meth:`clear` empties them."""
        starts, *buffered = self.group_buffer(n_buckets)
        runs = [tuple(a[starts[bucket]:starts[bucket + 1]] for a in buffered)]
        runs += [counts.touched_in_bucket(touched, table_keys, d, n_buckets, acc, bucket)
                 for d, (acc, touched, table_keys) in sorted(self.acc.items())]
        return counts.reduce_sorted(*(np.concatenate(column) for column in zip(*runs)))

    def group_buffer(self, n_buckets: int) -> tuple:
        """The buffer's rows grouped by bucket, worked out on first use: (starts, keys, hi, lo), bucket
        ``b``'s rows at ``starts[b]:starts[b + 1]``, keys ascending within it."""
        if self._buffered is None or len(self._buffered[0]) != n_buckets + 1:
            keys, hi, lo = self.buffer.result()
            buckets = counts.buckets_of(keys, n_buckets)
            # a stable sort of small integers is a radix sort in numpy (the first iteration's counts
            # all come through the buffer)
            order = np.argsort(buckets.astype(np.uint16) if n_buckets <= 1 << 16 else buckets, kind="stable")
            self._buffered = (np.searchsorted(buckets[order], np.arange(n_buckets + 1)),
                              keys[order], hi[order], lo[order])
        return self._buffered

    def clear(self) -> None:
        """Empty the counts (after :meth:`bucket_sums`), leaving the accumulators to the worker's next task."""
        self._buffered = None
        self._release()


def part_name(index: int) -> str:
    return f"part-{index:05d}.parquet"


# A reducer folds its rows once this many have arrived beyond its last fold (and beyond that fold's
# result). Payloads stay encoded until then (7-8 bytes per row) and a fold merges them as it decodes
# them (kernels.counts.CountBuffer). At 1M pairs, with 14M rows per reducer, folding every 4M rows
# took 1.4 s of a 1.8 s reducer; one fold now takes 0.2 s.
REDUCER_FOLD_ROWS = 16_000_000


def make_reducer(lex_url: str, n_parts: int, *, min_prob: float, prune_below: float | None):
    """The reducer: (partition index, (bucket, payload) records) -> one small summary dict (with the
    CRC-32 of the file it wrote, as :meth:`~spark_align.store.RunStore.checksums` gives it).

    ``lex_url``: fsspec URL of the table directory being written; ``n_parts``: the number of reducers
    (buckets). Each file records its bucket and a digest of its keys in its schema metadata, so the next
    E-step can use the files as they are and, where the keys did not change, read only their
    probabilities (``engine.tables.read_worker_tables``).
    """

    def reduce(index, records):
        keep_freed_memory()
        started = time.perf_counter()
        buffer = counts.CountBuffer(compact_rows=REDUCER_FOLD_ROWS)
        for _bucket, data in records:
            buffer.add_payload(data)
        summary = write_bucket(lex_url, n_parts, index, *buffer.result(), min_prob=min_prob, prune_below=prune_below)
        summary["seconds"] = time.perf_counter() - started
        note_task_memory("reduce")
        yield summary

    return reduce


def write_bucket(lex_url: str, n_parts: int, index: int, keys: np.ndarray, hi: np.ndarray, lo: np.ndarray, *,
                 min_prob: float, prune_below: float | None) -> dict:
    """The M-step of bucket ``index``: its rows summed (keys ascending and distinct, as a reducer's fold
    gives them) -> its table file, written under ``lex_url``; returns its small summary (see
    :func:`make_reducer`) without ``seconds``."""
    import fsspec

    summary = {"part": index, "dense": {}, "scalar": {}, "entries": {}, "pruned": {}}
    special = np.flatnonzero(((keys >> 32) & np.int64(2 ** 30 - 1)) < 2)  # src < 0: dense, scalars
    dirs, src, tgt = counts.split_keys(keys[special])
    for kind, code in (("dense", DENSE), ("scalar", SCALAR)):
        for k in np.flatnonzero(src == code):
            summary[kind][(int(dirs[k]), int(tgt[k]))] = (int(hi[special[k]]), int(lo[special[k]]))
    t_dir, t_src, t_tgt, prob = counts.normalise(keys, hi, lo, hi_scale=HI_SCALE, lo_scale=LO_SCALE,
                                                 min_prob=min_prob)
    if prune_below is not None:
        below = prob < prune_below
        for d in np.unique(t_dir):
            sel = t_dir == d
            summary["pruned"][int(d)] = (int(np.count_nonzero(below & sel)), float(prob[below & sel].sum()))
        keep = ~below
        t_dir, t_src, t_tgt, prob = t_dir[keep], t_src[keep], t_tgt[keep], prob[keep]
    for d, n_d in enumerate(np.bincount(t_dir, minlength=len(DIRS))):
        if n_d:
            summary["entries"][d] = int(n_d)
    schema = TABLE_SCHEMA.with_metadata({BUCKET_META: str(index), BUCKETS_META: str(n_parts),
                                         KEYS_META: keys_digest(t_dir, t_src, t_tgt)})
    table = pa.Table.from_arrays([pa.array(t_dir), pa.array(t_src), pa.array(t_tgt), pa.array(prob)],
                                 schema=schema)
    fs, root = fsspec.core.url_to_fs(lex_url)
    tmp = posixpath.join(root, "_temporary", f"{part_name(index)}.{uuid.uuid4().hex}")
    ensure_parent(fs, tmp)
    # No dictionary pages (probabilities never repeat enough) and LZ4 (raw) pages: 0.14 s against
    # 0.24 s to write 4.7M entries with the defaults, and as fast to read. The file's CRC-32 (for the
    # manifest) is taken from the bytes as they are written, not by reading them back on the driver;
    # streamed, not first written to memory (3.9M entries: 0.07 s against 0.09-0.37 s, the high
    # figure a fresh 34 MB buffer's page faults).
    with fs.open(tmp, "wb") as fh:
        sink = CrcWriter(fh)
        pq.write_table(table, sink, use_dictionary=False, compression="lz4_raw")
    summary["crc32"] = f"{sink.crc:08x}"
    fs.mv(tmp, posixpath.join(root, part_name(index)))
    return summary


def write_task_table(task: TaskCounts, n_parts: int, *, threads: int, lex_url: str, min_prob: float,
                     prune_below: float | None) -> list[dict]:
    """The M-step done by an iteration's only E-step task (``engine.estep.make_estep``'s ``write_table``):
    its counts are the totals, so it writes the ``n_parts`` bucket files itself, ``threads`` at a time,
    as the reducers would from its records, with nothing shuffled, taking one bucket's rows at a time
    from its accumulators (memory: a few buckets' rows per thread). Returns the reducers' summaries."""

    def write(index: int) -> dict:
        began = time.perf_counter()
        summary = write_bucket(lex_url, n_parts, index, *task.bucket_sums(index, n_parts), min_prob=min_prob,
                               prune_below=prune_below)
        summary["seconds"] = time.perf_counter() - began
        return summary

    task.group_buffer(n_parts)  # once, before the threads start
    summaries = map_threads(write, list(range(n_parts)), threads)
    task.clear()
    note_task_memory("reduce")
    return summaries


class CrcWriter:
    """A writable file that passes bytes on to ``fh`` and keeps their CRC-32 (``.crc``); closing it
    leaves ``fh`` open for its owner to close."""

    def __init__(self, fh) -> None:
        self.fh, self.crc, self.closed, self._written = fh, 0, False, 0

    def write(self, data) -> int:
        n = memoryview(data).nbytes
        self.crc = zlib.crc32(data, self.crc)
        self._written += n
        self.fh.write(data)
        return n

    def tell(self) -> int:
        return self._written

    def flush(self) -> None:
        self.fh.flush()

    def close(self) -> None:
        self.closed = True

    def writable(self) -> bool:
        return True


def combine(summaries: list[dict], directions: tuple[str, ...], *, prune_below: float | None) -> dict:
    """The reducers' summaries as per-direction sums: dense/scalar values, entries, pruning report."""
    ints: dict[tuple[str, int, int], list[int]] = {}
    for s in summaries:
        for kind in ("dense", "scalar"):
            for (d, idx), (h, lo) in s[kind].items():
                acc = ints.setdefault((kind, d, idx), [0, 0])
                acc[0] += h
                acc[1] += lo
    out = {d: {"dense": {}, "scalar": {}, "entries": 0, "pruned": None} for d in directions}
    for (kind, d, idx), (h, lo) in ints.items():
        out[DIRS[d]][kind][idx] = float(counts.from_fixed(np.array([h], np.int64), np.array([lo], np.int64),
                                                          HI_SCALE, LO_SCALE)[0])
    for s in sorted(summaries, key=lambda s: s["part"]):
        for d, n in s["entries"].items():
            out[DIRS[d]]["entries"] += n
    if prune_below is not None:
        for d in directions:
            removed, mass = 0, 0.0
            for s in sorted(summaries, key=lambda s: s["part"]):
                r, m = s["pruned"].get(DIRS.index(d), (0, 0.0))
                removed += r
                mass += m
            out[d]["pruned"] = {"threshold": prune_below, "removed": removed, "kept": out[d]["entries"],
                                "removed_mass": mass}
    return out


def reduce_and_write(sc, pairs, n_parts: int, lex_url: str, **kwargs) -> list[dict]:
    """Shuffle (bucket, payload) records to ``n_parts`` reducers, write the table; returns summaries."""
    return (pairs.partitionBy(n_parts, lambda bucket: bucket)
            .mapPartitionsWithIndex(make_reducer(lex_url, n_parts, **kwargs)).collect())


# -- reading encoded blocks straight from Parquet in the E-step tasks ----------------------------
def block_units(store) -> list[tuple[str, int]]:
    """(file path, row group) of every row group of a run's encoded blocks (footers only are read)."""
    units = []
    for name in sorted(store.files("encoded", "blocks")):
        path = store.fsspec_path("encoded", "blocks", name)
        with store.fs.open(path, "rb") as fh:
            n = pq.ParquetFile(fh).metadata.num_row_groups
        units.extend((path, rg) for rg in range(n))
    return units


def read_unit(fs, path: str, row_group: int, batch_rows: int = 4, columns: list[str] | None = None):
    """Record batches of a few block rows of one row group (memory: one row group at most); ``columns``:
    only those (None: all). A local file is memory-mapped (one copy of the bytes fewer)."""
    if isinstance(fs, LocalFileSystem):
        with pq.ParquetFile(fs._strip_protocol(path), memory_map=True) as source:
            yield from source.iter_batches(batch_size=batch_rows, row_groups=[row_group], columns=columns)
        return
    with fs.open(path, "rb") as fh:
        yield from pq.ParquetFile(fh).iter_batches(batch_size=batch_rows, row_groups=[row_group], columns=columns)
