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
``dict_keys`` exploded (``ingest.dict_entries``), ``idx`` its position -- is written once per run under
``encoded/block_dict`` (on first use). Per iteration::

    params = block_dict JOIN table ON key            -> (block_id, idx, dir, prob)
    blocks.groupBy(block_id).cogroup(params.groupBy(block_id)).applyInArrow(E-step)

Each cogroup call sees one block and its params and scatters them into
``t_local`` (``MIN_PROB`` where the join found nothing, as the broadcast
lookup does). Memory per task: one block plus 24 bytes x its dictionary,
independent of the table's size; the driver holds nothing table-sized. The
price is a shuffle per iteration of the block dictionary joined with the table
(about 30 bytes per dictionary entry) and of the blocks themselves (the link
grid: 4 bytes per cell), which the broadcast path avoids.

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
from spark_align.engine.estep import STATS_SCHEMA, _maybe_fail, block_rows, note_task_memory, rows_batch
from spark_align.engine.ingest import DICT_ENTRIES_SCHEMA, blocks_from_batch, dict_entries
from spark_align.engine.tables import DIRS, MIN_PROB, keep_freed_memory

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
    path = store.spark_path(*BLOCK_DICT)
    if not store.exists(*BLOCK_DICT, "_SUCCESS"):  # Spark writes _SUCCESS last: absent means unfinished
        blocks_df.mapInArrow(dict_entries, DICT_ENTRIES_SCHEMA).write.mode("overwrite").parquet(path)
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


def make_join_estep(model, directions: tuple[str, ...], dense: dict[str, dict]):
    """The cogroup function: (one block's row, its params) -> ``STATS_SCHEMA`` rows."""

    def estep(block_table: pa.Table, params: pa.Table) -> pa.Table:
        _maybe_fail()
        keep_freed_memory()
        parts = []
        idx = params.column("idx").to_numpy()
        dirs = params.column("dir").to_numpy()
        probs = params.column("prob").to_numpy()
        for batch in block_table.to_batches():
            for _block_id, _rows, block in blocks_from_batch(batch):
                t_locals = local_probs(len(block.dict_keys), idx, dirs, probs, directions)
                parts.extend(block_rows(model, directions, block, t_locals, dense))
        note_task_memory("join")
        if not parts:
            return pa.Table.from_batches([], schema=_stats_arrow_schema())
        return pa.Table.from_batches([rows_batch(parts)])

    return estep


def _stats_arrow_schema() -> pa.Schema:
    return pa.schema([("dir", pa.int8()), ("src", pa.int32()), ("tgt", pa.int32()),
                      ("hi", pa.int64()), ("lo", pa.int64())])


def join_stats(spark, store, blocks_df, table_path: str, model, directions: tuple[str, ...],
               dense: dict[str, dict]):
    """E-step rows (``STATS_SCHEMA``) of one iteration with per-block parameter shipping."""
    block_dict = block_dict_frame(spark, store, blocks_df)
    params = params_frame(block_dict, spark.read.parquet(table_path))
    fn = make_join_estep(model, directions, dense)
    return (blocks_df.groupBy("block_id").cogroup(params.groupBy("block_id"))
            .applyInArrow(fn, STATS_SCHEMA))
