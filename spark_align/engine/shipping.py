"""Per-partition parameter shipping, and the size rule that picks a shipping path.

Two ways get the lexical table to the E-step tasks; both give every block the
same float64 vector ``t_local`` (one probability per entry of the block's pair
dictionary, ``MIN_PROB`` where the table has no entry), so both give the same
counts, bit for bit.

``broadcast`` (``engine.tables``): every executor Python worker reads the whole
table from the checkpoint. Per executor Python worker: about 48 bytes x all
table entries (the sorted table, 16 bytes; the E-step's table-aligned count
accumulators, 17; the table's order by reducer bucket, 8; rounded up),
whatever the partition holds; the driver holds none of it.

``join`` (this module; distributed EM after Wolfe, Haghighi & Klein 2008):
each E-step task receives only the entries its blocks need, through Spark's
shuffle. The *unit keys* ``(unit, key)`` -- every distinct dictionary key of
each unit of work (one row group of encoded blocks, ``mstep.block_units``) --
are written once per run under ``encoded/unit_keys`` (on first use, with the
units they number in ``encoded/unit_keys.json``, written last). Per iteration::

    params = unit_keys LEFT JOIN table ON key     -> (unit, key, prob per direction)
    params.repartition(tasks, unit).sortWithinPartitions(unit).mapInArrow(E-step)

The E-step task takes one unit's rows at a time, reads that unit's blocks
from Parquet itself (as the broadcast path does: the blocks never pass through
the shuffle), finds each block's dictionary in the unit's entries (``MIN_PROB``
where the table has none, as the broadcast lookup gives) and folds the counts of
all its units into one sum per key before emitting them by reducer bucket:
a unit's counts go into accumulators aligned with its entries (as the broadcast
path's go into the whole table's), and leave them as sorted runs, which the
task merges. Memory per task: one unit's entries and accumulators (about 65
bytes per unit key) and blocks, and the task's folded counts, which it sends on
whenever they may hold ``TASK_KEYS`` distinct keys
(``spark.spark_align.joinTaskKeys``); nothing
table-sized anywhere, the driver included. The price is the join's shuffles every
iteration (the unit keys and the table by key, then the joined entries by
unit), which the broadcast path avoids.

The rule (``--shipping auto``): broadcast while the whole table fits the
budget, ``entries x 48 bytes <= --table-budget-mb``, else join. The default
budget (768 MB, 16.7M entries) is well under the memory a Python worker can use beside its
block work on a typical executor; raise it where executors are big, lower it
where many Python workers share one executor's memory.
"""
from __future__ import annotations

import posixpath
import time

import numpy as np
import pyarrow as pa

from spark_align.config import SHIPPINGS as SHIPPING_MODES
from spark_align.engine.estep import _maybe_fail, note_task_memory
from spark_align.engine.ingest import block_array
from spark_align.engine.tables import DIRS, MIN_PROB, DirectionTable, keep_freed_memory

BYTES_PER_ENTRY = 48  # per Python worker per entry on the whole-table path (see the module docstring)
DEFAULT_BUDGET_MB = 768
UNIT_KEYS = ("encoded", "unit_keys")
UNIT_KEYS_COMMIT = "encoded/unit_keys.json"  # the units the keys number, written last
# A join-path E-step task sends its folded counts on whenever they may hold this many distinct keys (24
# bytes each, 48 while they are merged, plus their encoding), so that its memory does not grow with its
# share of the corpus.
TASK_KEYS = 8_000_000
TASK_KEYS_CONF = "spark.spark_align.joinTaskKeys"


def choose_shipping(mode: str, n_entries: int | None, budget_mb: float) -> str:
    """'broadcast' or 'join' for a table of ``n_entries`` rows (None: the constant initial table).

    ``auto`` broadcasts while ``n_entries * BYTES_PER_ENTRY <= budget_mb * 2**20``.
    """
    if mode not in SHIPPING_MODES:
        raise ValueError(f"shipping must be one of {', '.join(SHIPPING_MODES)}, not {mode!r}")
    if n_entries is None:
        return "broadcast"  # a constant: nothing to ship per entry
    if mode != "auto":
        return mode
    return "broadcast" if n_entries * BYTES_PER_ENTRY <= budget_mb * 2 ** 20 else "join"


def table_entries(spark, table_path: str) -> int:
    """Rows of a checkpoint table (from Parquet footers: no data is read)."""
    import fsspec
    import pyarrow.dataset as ds

    from spark_align.store import fsspec_url

    try:
        fs, root = fsspec.core.url_to_fs(fsspec_url(table_path))
        return ds.dataset(root, filesystem=fs, format="parquet").count_rows()
    except (ImportError, OSError, ValueError):  # storage only Spark is configured for
        return spark.read.parquet(table_path).count()


UNIT_KEYS_SCHEMA = "unit int, key long"


def unit_keys_frame(spark, store, units: list[tuple[str, int]]):
    """(unit, key): the distinct dictionary keys of every unit of ``units`` (``mstep.block_units``),
    written once under ``encoded/unit_keys``; returns the frame and the units it numbers (as written in
    ``encoded/unit_keys.json``, the commit: absent means unfinished, and the keys are written again)."""
    from spark_align.store import fsspec_url

    path = store.spark_path(*UNIT_KEYS)
    if store.exists(UNIT_KEYS_COMMIT):
        listed = store.read_json(UNIT_KEYS_COMMIT)["units"]
        return spark.read.parquet(path), [(store.fsspec_path("encoded", "blocks", name), rg) for name, rg in listed]
    sc = spark.sparkContext
    rows = [(i, path_, rg) for i, (path_, rg) in enumerate(units)]
    units_df = sc.parallelize(rows, max(1, min(len(rows), 4 * sc.defaultParallelism))).toDF(
        "unit int, path string, row_group int")
    units_df.mapInArrow(unit_keys(fsspec_url(store.spark_path("encoded", "blocks"))),
                        UNIT_KEYS_SCHEMA).write.mode("overwrite").parquet(path)
    store.write_json(UNIT_KEYS_COMMIT, {"units": [[posixpath.basename(path_), rg] for path_, rg in units]})
    return spark.read.parquet(path), units


def unit_keys(blocks_url: str):
    """``mapInArrow`` function: (unit, path, row_group) rows -> (unit, key), the unit's blocks' dictionary
    keys, each once (only the ``dict_keys`` column is read)."""

    def fn(batches):
        import fsspec

        from spark_align.engine.mstep import read_unit

        fs, _root = fsspec.core.url_to_fs(blocks_url)
        for batch in batches:
            for unit, path, row_group in zip(*(batch.column(i).to_pylist() for i in range(3))):
                keys = [block_array(b.column(0), k, "dict_keys")
                        for b in read_unit(fs, path, row_group, columns=["dict_keys"]) for k in range(b.num_rows)]
                keys = np.unique(np.concatenate(keys)) if keys else np.zeros(0, np.int64)
                yield pa.RecordBatch.from_arrays([pa.array(np.full(len(keys), unit, np.int32)), pa.array(keys)],
                                                 names=["unit", "key"])

    return fn


def params_frame(unit_keys_df, table_df, directions: tuple[str, ...]):
    """(unit, key, <one probability column per direction>): every unit key with the table's entry for it
    in each direction (null where the table has none; a left join, so that every unit has rows). The
    table is first turned into one row per key (a full outer join of its directions): half the rows the
    join would otherwise give and send to the E-step. At 100k pairs and 30.6M entries the whole join
    took 23-24 s against 28-34 s with the same rows made by a grouped aggregation, whose partial
    aggregation before the shuffle merges almost nothing."""
    from pyspark.sql import functions as F

    key = F.shiftleft(F.col("src").cast("long"), 32).bitwiseOR(F.col("tgt").cast("long"))
    parts = [table_df.filter(F.col("dir") == DIRS.index(d)).select(key.alias("key"), F.col("prob").alias(d))
             for d in directions]
    by_key = parts[0]
    for part in parts[1:]:
        by_key = by_key.join(part, "key", "full")
    return unit_keys_df.join(by_key, "key", "left").select("unit", "key", *directions)


def unit_tables(params: pa.Table, directions: tuple[str, ...]) -> dict[str, DirectionTable]:
    """One unit's joined entries as a sorted :class:`~spark_align.engine.tables.DirectionTable` per
    direction, which finds a block's dictionary in them as the broadcast path finds it in the whole
    table (``MIN_PROB`` where the table has no entry)."""
    import pyarrow.compute as pc

    keys = params.column("key").to_numpy()
    order = np.argsort(keys, kind="stable")
    sorted_keys = np.ascontiguousarray(keys[order])
    return {d: DirectionTable(sorted_keys, pc.fill_null(params.column(d), MIN_PROB).to_numpy()[order])
            for d in directions}


def make_join_estep(model, directions: tuple[str, ...], dense: dict[str, dict], *, blocks_url: str,
                    units: list[tuple[str, int]], n_buckets: int, flush_keys: int = TASK_KEYS):
    """The ``mapInArrow`` E-step of the join path: a task's params rows, sorted by unit -> (bucket,
    payload) records of its units' counts, folded (``engine.mstep``) and sent on whenever they may hold
    ``flush_keys`` distinct keys and at the end, and the timing scalars of ``engine.estep``'s module
    docstring (3, 4, 5, 7 and 8).

    A unit's counts are added into accumulators aligned with its entries (found once per block for
    both directions, as the broadcast path adds into the whole table's) and leave them as sorted runs,
    which the task's :class:`~spark_align.kernels.counts.CountBuffer` merges."""

    def estep(batches):
        import fsspec

        from spark_align.engine import mstep
        from spark_align.engine.estep import block_results, read_blocks, timing_payloads
        from spark_align.kernels import counts, lookup

        _maybe_fail()
        keep_freed_memory()
        started = time.perf_counter()
        fs, _root = fsspec.core.url_to_fs(blocks_url)
        folded = counts.CountBuffer()  # the counts not sent yet
        seconds = {"lookup": 0.0, "add": 0.0, "read": 0.0, "payload": 0.0}

        def send(records):
            for bucket, data in records:
                yield pa.RecordBatch.from_arrays([pa.array([bucket], pa.int32()), pa.array([data], pa.binary())],
                                                 names=["bucket", "payload"])

        def fold(task: mstep.TaskCounts) -> None:
            added = time.perf_counter()
            for run in task.rows():
                folded.add(*run)
            seconds["add"] += time.perf_counter() - added

        def flush():
            nonlocal folded
            payload_started = time.perf_counter()
            records = list(mstep.payloads(folded, n_buckets))
            folded = counts.CountBuffer()
            seconds["payload"] += time.perf_counter() - payload_started
            return records

        def run_unit(unit: int, pieces: list[pa.RecordBatch]):
            looked_up = time.perf_counter()
            entries = unit_tables(pa.Table.from_batches(pieces), directions)
            keys = entries[directions[0]].keys  # the same sorted keys in every direction
            seconds["lookup"] += time.perf_counter() - looked_up
            read_started = time.perf_counter()
            blocks = read_blocks(fs, *units[unit], with_keys=True)
            seconds["read"] += time.perf_counter() - read_started
            task, pending = mstep.TaskCounts(entries), 0
            for block in blocks:
                looked_up = time.perf_counter()
                found = lookup.positions(keys, block.dict_keys)
                t_locals = {d: np.where(found[1], entries[d].probs[found[0]], MIN_PROB) for d in directions}
                seconds["lookup"] += time.perf_counter() - looked_up
                for result in block_results(model, directions, block, t_locals, dense):
                    added = time.perf_counter()
                    task.add(block.dict_keys, found, *result)
                    seconds["add"] += time.perf_counter() - added
                pending += len(block.dict_keys) * len(directions)
                if folded.max_keys + pending >= flush_keys:
                    fold(task)
                    pending = 0
                    yield from send(flush())
            fold(task)

        current, pieces = None, []
        for batch in batches:
            if batch.num_rows == 0:
                continue
            unit_col = batch.column(0).to_numpy()
            cuts = [0, *(np.flatnonzero(unit_col[1:] != unit_col[:-1]) + 1).tolist(), len(unit_col)]
            for lo, hi in zip(cuts[:-1], cuts[1:]):
                unit = int(unit_col[lo])
                if current is not None and unit != current:
                    yield from run_unit(current, pieces)
                    pieces = []
                current = unit
                pieces.append(batch.slice(lo, hi - lo))
        if current is not None:
            yield from run_unit(current, pieces)
        records = flush()
        note_task_memory("join")
        values = [time.perf_counter() - started, seconds["lookup"], seconds["add"], 0.0, seconds["read"],
                  seconds["payload"]]
        yield from send([*records, *timing_payloads(directions, values, n_buckets)])

    return estep


PAYLOAD_DDL = "bucket int, payload binary"


def join_payloads(spark, store, units: list[tuple[str, int]], table_path: str, model, directions: tuple[str, ...],
                  dense: dict[str, dict], *, n_tasks: int, n_buckets: int, flush_keys: int = TASK_KEYS):
    """The (bucket, payload) records of one iteration with per-unit parameter shipping, as an RDD (what
    ``engine.mstep.reduce_and_write`` takes)."""
    from spark_align.store import fsspec_url

    keys_df, numbered = unit_keys_frame(spark, store, units)
    params = params_frame(keys_df, spark.read.parquet(table_path), directions)
    fn = make_join_estep(model, directions, dense, blocks_url=fsspec_url(store.spark_path("encoded", "blocks")),
                         units=numbered, n_buckets=n_buckets, flush_keys=flush_keys)
    return (params.repartition(n_tasks, "unit").sortWithinPartitions("unit")
            .mapInArrow(fn, PAYLOAD_DDL).rdd.map(lambda row: (row[0], row[1])))
