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
each block receives only the entries of its own dictionary, through Spark's
shuffle. The *block dictionary* ``(block_id, idx, key)`` -- every block's
``dict_keys`` exploded, ``idx`` its position -- is written once per run under
``encoded/block_dict`` (on first use). Per iteration::

    params = block_dict JOIN table ON key JOIN unit_of ON block_id  -> (unit, block_id, idx, dir, prob)
    params.groupBy(unit).applyInArrow(E-step of the unit's blocks)  -> (bucket, payload)

A *unit* is one row group of the encoded blocks (``engine.mstep.block_units``).
Each group reads its unit's blocks straight from Parquet, scatters each
block's params into ``t_local`` (``MIN_PROB`` where the join found nothing, as
the broadcast lookup does), and folds the unit's counts into one payload per
reducer bucket. Memory per task: one row group of blocks plus 24 bytes x their
dictionaries, independent of the table's size; the driver holds nothing
table-sized. The price is a shuffle per iteration of the block dictionary
joined with the table (about 30 bytes per dictionary entry), which the
broadcast path avoids; the blocks themselves are never shuffled.

The rule (``--shipping auto``): broadcast while the whole table fits the
budget, ``entries x 48 bytes <= --table-budget-mb``, else join. The default
budget (768 MB, 16.7M entries) is well under the memory a Python worker can use beside its
block work on a typical executor; raise it where executors are big, lower it
where many Python workers share one executor's memory.
"""
from __future__ import annotations

import numpy as np
import pyarrow as pa

from spark_align.config import SHIPPINGS as SHIPPING_MODES
from spark_align.engine.estep import _maybe_fail, block_results, note_task_memory
from spark_align.engine.ingest import blocks_from_batch
from spark_align.engine.tables import DIRS, MIN_PROB

BYTES_PER_ENTRY = 48  # per Python worker per entry on the whole-table path (see the module docstring)
DEFAULT_BUDGET_MB = 768
BLOCK_DICT = ("encoded", "block_dict")


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


def block_dict_frame(spark, store, blocks_df):
    """The exploded block dictionaries (block_id, idx, key), written once under ``encoded/block_dict``."""
    from pyspark.sql import functions as F

    path = store.spark_path(*BLOCK_DICT)
    if not store.exists(*BLOCK_DICT, "_SUCCESS"):  # Spark writes _SUCCESS last: absent means unfinished
        (blocks_df.select("block_id", F.posexplode("dict_keys").alias("idx", "key"))
         .select("block_id", F.col("idx").cast("int").alias("idx"), "key")
         .write.mode("overwrite").parquet(path))
    return spark.read.parquet(path)


def params_frame(block_dict, table_df):
    """(block_id, idx, dir, prob): the table entries each block's dictionary needs."""
    from pyspark.sql import functions as F

    keyed = table_df.select("dir", (F.shiftleft(F.col("src").cast("long"), 32)
                                    .bitwiseOR(F.col("tgt").cast("long"))).alias("key"), "prob")
    return block_dict.join(keyed, "key").select("block_id", "idx", "dir", "prob")


def local_probs(n_dict: int, idx: np.ndarray, dirs: np.ndarray, probs: np.ndarray,
                directions: tuple[str, ...]) -> dict[str, np.ndarray]:
    """Per direction, float64 (n_dict,): ``probs`` scattered to ``idx``, ``MIN_PROB`` elsewhere."""
    out = {}
    for direction in directions:
        sel = dirs == DIRS.index(direction)
        t = np.full(n_dict, MIN_PROB)
        t[idx[sel]] = probs[sel]
        out[direction] = t
    return out


def make_join_estep(model, directions: tuple[str, ...], dense: dict[str, dict], units: list[tuple[str, int]],
                    blocks_url: str, n_buckets: int):
    """The ``applyInArrow`` function: one unit's params -> (bucket, payload) rows of its counts.

    A group holds the params of every block of one row group (``unit``) of the encoded blocks, plus
    one marker row (``block_id`` -1) so that a unit whose entries were all pruned still has a group.
    The function reads the unit's blocks itself (pyarrow through fsspec), scatters each block's
    params into its ``t_local``, runs the E-step and folds the unit's counts before emitting them.
    """

    def estep(params: pa.Table) -> pa.Table:
        import fsspec

        from spark_align.engine import mstep

        _maybe_fail()
        path, row_group = units[params.column("unit")[0].as_py()]
        block_id = params.column("block_id").to_numpy()
        order = np.argsort(block_id, kind="stable")
        sorted_ids = block_id[order]
        idx, dirs, probs = (params.column(c).to_numpy() for c in ("idx", "dir", "prob"))
        fs, _root = fsspec.core.url_to_fs(blocks_url)
        task = mstep.TaskCounts({})  # no table here: every count goes through the task's buffer
        for batch in mstep.read_unit(fs, path, row_group):
            for bid, _rows, block in blocks_from_batch(batch):
                lo, hi = np.searchsorted(sorted_ids, [bid, bid + 1])
                mine = order[lo:hi]
                t_locals = local_probs(len(block.dict_keys), idx[mine], dirs[mine], probs[mine], directions)
                for result in block_results(model, directions, block, t_locals, dense):
                    task.add(block.dict_keys, None, *result)
        note_task_memory("join")
        records = list(task.payloads(n_buckets))
        return pa.table({"bucket": pa.array([b for b, _ in records], pa.int32()),
                         "payload": pa.array([data for _, data in records], pa.binary())})

    return estep


def join_payloads(spark, store, units: list[tuple[str, int]], unit_blocks: list[tuple[int, int]],
                  table_path: str, model, directions: tuple[str, ...], dense: dict[str, dict], n_buckets: int):
    """(bucket, payload) pairs of one iteration with per-block parameter shipping.

    ``units``: (file, row group) of the encoded blocks; ``unit_blocks``: (unit index, block_id) of
    every block. Only the joined params are shuffled (to the unit that needs them); the blocks stay
    where they are written and are read by the task that decodes their unit.
    """
    from pyspark.sql import functions as F

    from spark_align.engine import mstep
    from spark_align.store import fsspec_url

    blocks_df = spark.read.parquet(store.spark_path("encoded", "blocks"))
    block_dict = block_dict_frame(spark, store, blocks_df)
    unit_of = spark.createDataFrame(unit_blocks, "unit int, block_id long")
    params = (params_frame(block_dict, spark.read.parquet(table_path)).join(F.broadcast(unit_of), "block_id")
              .select("unit", "block_id", F.col("idx").cast("int").alias("idx"),
                      F.col("dir").cast("byte").alias("dir"), F.col("prob").cast("double").alias("prob")))
    markers = spark.createDataFrame([(u, -1, -1, 0, 0.0) for u in range(len(units))],
                                    "unit int, block_id long, idx int, dir byte, prob double")
    fn = make_join_estep(model, directions, dense, units, fsspec_url(store.spark_path("encoded", "blocks")),
                         n_buckets)
    return (params.unionByName(markers).groupBy("unit").applyInArrow(fn, mstep.PAYLOAD_DDL)
            .rdd.map(lambda row: (row[0], row[1])))
