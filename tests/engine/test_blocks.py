"""The encoded block format: big arrays as binary values, list-encoded blocks of earlier versions still read."""
from __future__ import annotations

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

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


def test_row_groups_read_the_same_memory_mapped_and_streamed(tmp_path):
    # mstep.read_unit memory-maps local files and streams any other store's: same blocks either way,
    # whether the file is compressed (what earlier versions wrote) or not (what ingestion writes now).
    import fsspec

    from spark_align.engine import estep, mstep

    rng = np.random.default_rng(5)
    blocks = [_block(rng) for _ in range(5)]
    rows = [np.arange(40, dtype=np.int64) + 40 * i for i in range(5)]
    table = pa.Table.from_batches([ingest.block_batch(i, r, b) for i, (r, b) in enumerate(zip(rows, blocks))])
    local = fsspec.filesystem("file")
    memory = fsspec.filesystem("memory")
    for compression in ("none", "lz4_raw"):
        path = tmp_path / f"blocks-{compression}.parquet"
        pq.write_table(table, path, row_group_size=2, compression=compression)
        remote = f"/read-unit-test/{path.name}"
        memory.pipe(remote, path.read_bytes())
        try:
            assert pq.ParquetFile(path).metadata.num_row_groups == 3
            for with_keys in (True, False):
                got = {name: [b for rg in range(3) for b in estep.read_blocks(fs, p, rg, with_keys=with_keys)]
                       for name, fs, p in (("mapped", local, str(path)), ("streamed", memory, remote))}
                assert len(got["mapped"]) == len(got["streamed"]) == 5
                for a, b, want in zip(got["mapped"], got["streamed"], blocks):
                    for field in ("src_offsets", "src_ids", "tgt_offsets", "tgt_ids", "grid_offsets", "grid"):
                        np.testing.assert_array_equal(getattr(a, field), getattr(want, field))
                        np.testing.assert_array_equal(getattr(b, field), getattr(want, field))
                    if with_keys:
                        np.testing.assert_array_equal(a.dict_keys, want.dict_keys)
                        np.testing.assert_array_equal(b.dict_keys, want.dict_keys)
                    else:
                        assert a.dict_keys is None and b.dict_keys is None
            # a column subset through read_unit itself, on both branches
            for fs, p in ((local, str(path)), (memory, remote)):
                ids = [batch.column(0).to_pylist() for batch in mstep.read_unit(fs, p, 2, columns=["block_id"])]
                assert ids == [[4]]
        finally:
            memory.rm("/read-unit-test", recursive=True)


@pytest.mark.parametrize("kind", [pa.binary(), pa.large_binary()])
def test_block_values_are_read_from_the_column_buffers_sliced_null_empty_or_unaligned(kind):
    from spark_align.engine.ingest import block_array

    grids = [np.arange(5, dtype="<i4").tobytes(), None, b"", np.arange(7, dtype="<i4").tobytes()]
    column = pa.array(grids, kind)
    for start in range(len(grids)):  # batches read from Parquet can be slices of a longer array
        part = column.slice(start)
        got = [block_array(part, k, "grid").tolist() for k in range(len(part))]
        assert got == [np.frombuffer(v, "<i4").tolist() if v else [] for v in grids[start:]]
    # a value 4 bytes into the data buffer: copied to an aligned array for the compiled kernels
    keys = block_array(pa.array([b"1234", np.arange(3, dtype="<i8").tobytes()], kind), 1, "dict_keys")
    assert keys.tolist() == [0, 1, 2] and keys.ctypes.data % 8 == 0 and keys.dtype == np.int64


def test_mapped_blocks_are_written_once_read_in_place_and_a_bad_file_is_ignored(tmp_path):
    """On a local file system the E-step's blocks come from the row group's mapped Arrow file
    (engine.mapped), which the first read from Parquet writes: the same arrays as Parquet's; a missing,
    truncated or foreign file is ignored and written again; other file systems never get one."""
    import fsspec

    from spark_align.engine import estep, mapped

    rng = np.random.default_rng(7)
    blocks = [_block(rng) for _ in range(5)]
    rows = [np.arange(40, dtype=np.int64) + 40 * i for i in range(5)]
    table = pa.Table.from_batches([ingest.block_batch(i, r, b) for i, (r, b) in enumerate(zip(rows, blocks))])
    path = tmp_path / "encoded" / "blocks" / "part-0.parquet"
    path.parent.mkdir(parents=True)
    pq.write_table(table, path, row_group_size=2, compression="none")
    local = fsspec.filesystem("file")
    root = estep.mapped_blocks_root(local, str(path.parent))
    assert root == str(tmp_path / "encoded" / "mapped")
    assert estep.mapped_blocks_root(fsspec.filesystem("memory"), "/x/encoded/blocks") is None

    def read_all(with_keys=False):
        return [b for rg in range(3) for b in estep.read_blocks(local, str(path), rg, with_keys=with_keys,
                                                                mapped_root=root)]

    def check(got):
        assert len(got) == 5
        for a, want in zip(got, blocks):
            for field in ("src_offsets", "src_ids", "tgt_offsets", "tgt_ids", "grid_offsets", "grid"):
                np.testing.assert_array_equal(getattr(a, field), getattr(want, field))

    mapped.forget()
    check(read_all(with_keys=True))  # a read with the keys writes the files too (without the keys)
    files = sorted(p.name for p in (tmp_path / "encoded" / "mapped").iterdir())
    assert files == [f"part-0.parquet.rg{i:05d}" for i in range(3)]
    check(read_all())
    # read in place: the grid's memory is the map's, not a copy
    got = estep.read_blocks(local, str(path), 1, with_keys=False, mapped_root=root)
    assert not got[0].grid.flags.writeable and not got[0].grid.flags.owndata

    target = mapped.mapped_path(root, str(path), 1)
    mapped.forget()
    with open(target, "r+b") as fh:
        fh.truncate(100)
    assert mapped.read(target, estep.MAPPED_COLUMNS) is None
    check(read_all())  # read from Parquet and written again
    assert mapped.read(target, estep.MAPPED_COLUMNS) is not None
    # a file of the right form but other blocks (a grid too short for its sentences) is not taken
    mapped.forget()
    short = table.slice(2, 2).select(estep.MAPPED_COLUMNS).combine_chunks().to_batches()[0]
    at = short.schema.get_field_index("grid")
    grid = pa.array([b"\x00" * 8, short.column(at)[1].as_py()], pa.binary())
    mapped.write(target, [short.set_column(at, "grid", grid)])
    assert mapped.read(target, estep.MAPPED_COLUMNS) is None
    # nor one with other columns (the keys included)
    mapped.write(target, table.slice(2, 2).select(estep.E_STEP_COLUMNS).to_batches())
    assert mapped.read(target, estep.MAPPED_COLUMNS) is None
    check(read_all())
    mapped.forget()
