"""The encoded block format: big arrays as binary values, list-encoded blocks of earlier versions still read."""
from __future__ import annotations

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from spark_align.engine import ingest
from spark_align.kernels import ragged


def _block(rng):
    src_len, tgt_len = rng.integers(1, 9, 40), rng.integers(1, 9, 40)
    return ragged.build_block(ragged.offsets_from_lengths(src_len), rng.integers(1, 60, src_len.sum()).astype(np.int32),
                              ragged.offsets_from_lengths(tgt_len), rng.integers(1, 50, tgt_len.sum()).astype(np.int32))


def _same(a: ragged.Block, b: ragged.Block) -> None:
    for field in ("src_offsets", "src_ids", "tgt_offsets", "tgt_ids", "dict_keys", "grid_offsets", "grid"):
        np.testing.assert_array_equal(getattr(a, field), getattr(b, field))


def test_blocks_round_trip_through_parquet_in_both_formats(tmp_path):
    rng = np.random.default_rng(3)
    blocks = [_block(rng) for _ in range(3)]
    rows = [np.arange(40, dtype=np.int64) + 40 * i for i in range(3)]
    table = pa.Table.from_batches([ingest.block_batch(i, r, b) for i, (r, b) in enumerate(zip(rows, blocks))])
    assert table.schema.field("grid").type == pa.binary()
    # What earlier versions wrote: every array a list.
    old = table.set_column(6, "dict_keys", pa.array([b.dict_keys for b in blocks], pa.list_(pa.int64())))
    old = old.set_column(7, "grid", pa.array([b.grid for b in blocks], pa.list_(pa.int32())))
    for name, t in (("new", table), ("old", old)):
        pq.write_table(t, tmp_path / f"{name}.parquet", row_group_size=2)
        got = [x for batch in pq.ParquetFile(tmp_path / f"{name}.parquet").iter_batches(batch_size=2)
               for x in ingest.blocks_from_batch(batch)]
        assert [g[0] for g in got] == [0, 1, 2]
        for (_, r, b), want_rows, want in zip(got, rows, blocks):
            np.testing.assert_array_equal(r, want_rows)
            _same(b, want)
            assert b.grid.dtype == np.int32 and b.dict_keys.dtype == np.int64
        entries = pa.Table.from_batches(list(ingest.dict_entries(pq.read_table(tmp_path / f"{name}.parquet")
                                                                 .to_batches())))
        np.testing.assert_array_equal(entries.column("key").to_numpy(), np.concatenate([b.dict_keys for b in blocks]))
        np.testing.assert_array_equal(entries.column("idx").to_numpy(),
                                      np.concatenate([np.arange(len(b.dict_keys)) for b in blocks]))
    # The binary form is the smaller and needs no list levels.
    assert (tmp_path / "new.parquet").stat().st_size < (tmp_path / "old.parquet").stat().st_size
