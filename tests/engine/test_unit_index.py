"""Stored unit indexes (engine.unit_index): the join E-step gives the same counts with or without them,
and ignores one that is damaged or does not fit its blocks."""
from __future__ import annotations

import zlib

import fsspec
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from spark_align.engine import ingest, shipping, unit_index
from spark_align.engine.estep import SCALAR
from spark_align.kernels import counts, lookup, ragged
from spark_align.models.ibm1 import IBM1
from tests.engine.helpers import routed_records

DIRECTIONS = ("forward", "reverse")


def _block(rng, n_pairs=30):
    src_len, tgt_len = rng.integers(1, 9, n_pairs), rng.integers(1, 9, n_pairs)
    return ragged.build_block(ragged.offsets_from_lengths(src_len), rng.integers(1, 40, src_len.sum()).astype(np.int32),
                              ragged.offsets_from_lengths(tgt_len), rng.integers(1, 35, tgt_len.sum()).astype(np.int32))


def test_index_encodes_what_the_blocks_give_and_refuses_damage():
    rng = np.random.default_rng(1)
    dictionaries = [_block(rng).dict_keys for _ in range(3)]
    index = unit_index.build(dictionaries, 5)
    keys = np.unique(np.concatenate(dictionaries))
    np.testing.assert_array_equal(index.keys, keys)
    np.testing.assert_array_equal(index.positions, np.concatenate([lookup.positions(keys, k)[0] for k in dictionaries]))
    np.testing.assert_array_equal(index.keys[index.positions], np.concatenate(dictionaries))
    for d in (0, 1):
        for got, want in zip(index.order(d, 5), shipping.bucket_order(keys, d, 5)):
            np.testing.assert_array_equal(got, want)
        for got, want in zip(index.order(d, 3), shipping.bucket_order(keys, d, 3)):  # other buckets: worked out
            np.testing.assert_array_equal(got, want)
    data = unit_index.encode(index)
    back = unit_index.decode(data)
    np.testing.assert_array_equal(back.keys, index.keys)
    np.testing.assert_array_equal(back.positions, index.positions)
    assert back.n_buckets == 5 and back.fits([len(k) for k in dictionaries])
    assert not back.fits([len(k) for k in dictionaries[:2]])
    flipped = bytearray(data)
    flipped[40] ^= 1
    for bad, match in ((bytes(flipped), "CRC-32"), (data[:-9], "truncated"), (b"x" * 64, "not a unit index")):
        with pytest.raises(ValueError, match=match):
            unit_index.decode(bad)


def test_join_estep_counts_the_same_with_a_stored_index_and_ignores_a_bad_one(tmp_path):
    rng = np.random.default_rng(7)
    blocks = [_block(rng) for _ in range(4)]
    table = pa.Table.from_batches([ingest.block_batch(i, np.arange(30, dtype=np.int64) + 30 * i, b)
                                   for i, b in enumerate(blocks)])
    path = str(tmp_path / "blocks" / "part-00000.parquet")
    (tmp_path / "blocks").mkdir()
    pq.write_table(table, path, row_group_size=2)  # two units of two blocks
    units = [(path, 0), (path, 1)]
    unit_keys = {u: np.unique(np.concatenate([b.dict_keys for b in blocks[2 * u:2 * u + 2]])) for u in range(2)}
    entries = {}
    for d in (0, 1):
        keys = np.unique(np.concatenate(list(unit_keys.values())))
        keys = keys[(keys >> 32 != 0) if d == 1 else (keys & 0xFFFFFFFF) != 0]  # the NULL side's keys are not kept
        keys = keys[rng.random(len(keys)) < 0.9]  # and some pairs missing: the floor is taken there
        entries[d] = (keys, rng.uniform(0.01, 1.0, len(keys)))
    routed = routed_records(tmp_path, unit_keys, entries, n_buckets=3)
    model = IBM1()
    dense = {d: model.init_dense(None) for d in DIRECTIONS}
    index_root = str(tmp_path / "unit_index")

    def run(index_url):
        estep = shipping.make_join_estep(model, DIRECTIONS, dense, blocks_url=str(tmp_path / "blocks"), units=units,
                                         n_tasks=1, n_buckets=3, index_url=index_url)
        buffer = counts.CountBuffer()
        for _bucket, data in estep(0, iter((u, r) for u in sorted(routed) for r in routed[u])):
            buffer.add_payload(data)
        keys, hi, lo = buffer.result()
        dirs, src, tgt = counts.split_keys(keys)
        timing = (src == SCALAR) & (tgt != 0) & (tgt != 2)  # seconds differ from run to run
        assert np.any(src >= 0)
        return [a[~timing].tolist() for a in (keys, hi, lo)]

    want = run(None)
    first = run(index_root)  # works the indexes out and stores them
    files = sorted(fsspec.filesystem("file").ls(index_root))
    assert len(files) == 2 and all(f.endswith((".rg00000", ".rg00001")) for f in files)
    second = run(index_root)  # reads them
    assert first == want and second == want
    # a damaged file and one of other blocks are ignored (and stored again)
    with open(files[0], "r+b") as fh:
        fh.seek(50)
        byte = fh.read(1)
        fh.seek(50)
        fh.write(bytes([byte[0] ^ 1]))
    other = unit_index.build([blocks[0].dict_keys], 3)
    with open(files[1], "wb") as fh:
        fh.write(unit_index.encode(other))
    assert run(index_root) == want
    assert unit_index.read(fsspec.filesystem("file"), index_root, path, 1).fits([blocks[2].n_dict, blocks[3].n_dict])


def test_a_cache_file_is_written_whole_or_not_at_all(tmp_path):
    # store.CacheWriter: moved into place on commit; a failed write or a discard leaves nothing behind
    from spark_align.store import CacheWriter

    fs = fsspec.filesystem("file")
    whole = CacheWriter(fs, str(tmp_path / "c" / "whole.bin"))
    whole.write(b"abc")
    whole.write(b"de")
    assert (whole.size, whole.crc) == (5, zlib.crc32(b"abcde"))
    whole.commit()
    assert (tmp_path / "c" / "whole.bin").read_bytes() == b"abcde"

    class Failing:
        def write(self, _data):
            raise OSError("disk full")

        def close(self):
            pass

    broken = CacheWriter(fs, str(tmp_path / "c" / "broken.bin"))
    broken.write(b"abc")
    broken.fh.close()
    broken.fh = Failing()
    broken.write(b"de")  # lost: no error, and nothing later is written
    broken.commit()
    dropped = CacheWriter(fs, str(tmp_path / "c" / "dropped.bin"))
    dropped.write(b"abc")
    dropped.discard()
    assert sorted(p.name for p in (tmp_path / "c").iterdir()) == ["whole.bin"]
