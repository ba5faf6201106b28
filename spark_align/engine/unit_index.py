"""Stored unit indexes: what the join path's E-step works out for a unit of blocks once, not every iteration.

On the join path (``engine.shipping``) an E-step task places each unit's routed entries in the unit's
sorted distinct dictionary keys, and finds every block's dictionary there. None of that depends on
the table: the keys, each block key's position among them and the keys' order by table bucket are
fixed by the blocks, which never change within a run. Worked out afresh, they were about 30% of a
join E-step task at 100k pairs (sorting the keys, searching each block's dictionary, ordering the
keys by bucket). So the first E-step over a unit stores them, one file per row group of
``encoded/blocks``: ``encoded/unit_index/<blocks file>.rgNNNNN`` (:class:`UnitIndex`, with a CRC-32),
and later iterations read the file instead, and the blocks without their dictionary keys.

Like ``engine.hints``, a unit index is a cache: a file that is missing, damaged (wrong CRC-32, wrong
length) or does not fit the row group's blocks (another number of dictionary keys, positions out of
range) is ignored, the unit is worked out from its blocks as before and the file written again.
Files are written under a unique temporary name and moved into place, so readers see whole files
or none, and their names carry the blocks file's name, which is unique to one ingestion. Bucket
orders are stored for one number of buckets; with another, they are worked out again from the keys.
"""
from __future__ import annotations

import posixpath
import struct
import zlib
from dataclasses import dataclass

import numpy as np

from spark_align.engine.shipping import bucket_order, distinct_keys
from spark_align.kernels import lookup
from spark_align.store import read_cached, write_cached

_MAGIC = b"SAUNIT01"
_HEADER = struct.Struct("<8sqqq")  # magic, keys, positions, buckets
N_DIRECTIONS = 2  # orders are stored for both directions, whichever a run trains


@dataclass(frozen=True)
class UnitIndex:
    """One unit's dictionary keys as the join E-step uses them.

    ``keys``: the distinct keys of the unit's block dictionaries, ascending (int64);
    ``positions``: the position of every block dictionary key among ``keys``, blocks in order (int32);
    ``n_buckets`` and ``orders``: per direction index, ``engine.shipping.bucket_order`` of ``keys`` for
    that many table buckets (order int32, bounds int64)."""

    keys: np.ndarray
    positions: np.ndarray
    n_buckets: int
    orders: tuple[tuple[np.ndarray, np.ndarray], ...]

    def fits(self, sizes: list[int]) -> bool:
        """Whether this can be the index of blocks whose dictionaries have ``sizes`` keys each."""
        return (len(self.positions) == int(np.sum(sizes, dtype=np.int64))
                and (len(self.positions) == 0 or (int(self.positions.min()) >= 0
                                                  and int(self.positions.max()) < len(self.keys))))

    def order(self, d: int, n_buckets: int) -> tuple[np.ndarray, np.ndarray]:
        """``bucket_order`` of the keys in direction ``d``: stored for ``self.n_buckets``, else worked out."""
        return self.orders[d] if n_buckets == self.n_buckets else bucket_order(self.keys, d, n_buckets)


def build(dictionaries: list[np.ndarray], n_buckets: int) -> UnitIndex:
    """The index of a unit whose blocks have these dictionaries (each sorted, as blocks store them)."""
    keys = distinct_keys(dictionaries)
    positions = np.empty(sum(len(k) for k in dictionaries), np.int32)
    at = 0
    for dict_keys in dictionaries:
        pos, hit = lookup.positions(keys, dict_keys)
        if not np.all(hit):  # cannot be: every dictionary key is one of the unit's keys
            raise RuntimeError("a block dictionary key is missing from its unit's keys")
        positions[at:at + len(dict_keys)] = pos
        at += len(dict_keys)
    orders = []
    for d in range(N_DIRECTIONS):
        order, bounds = bucket_order(keys, d, n_buckets)
        orders.append((order.astype(np.int32), bounds.astype(np.int64)))
    return UnitIndex(keys, positions, n_buckets, tuple(orders))


def encode(index: UnitIndex) -> bytes:
    """``index`` as bytes for :func:`decode`."""
    parts = [_HEADER.pack(_MAGIC, len(index.keys), len(index.positions), index.n_buckets),
             np.ascontiguousarray(index.keys, "<i8").tobytes(), np.ascontiguousarray(index.positions, "<i4").tobytes()]
    for order, bounds in index.orders:
        parts += [np.ascontiguousarray(order, "<i4").tobytes(), np.ascontiguousarray(bounds, "<i8").tobytes()]
    body = b"".join(parts)
    return body + struct.pack("<I", zlib.crc32(body))


def decode(data: bytes) -> UnitIndex:
    """:func:`encode` undone; ValueError if ``data`` is not a whole, undamaged encoding."""
    head = _HEADER.size
    if len(data) < head + 4 or data[:len(_MAGIC)] != _MAGIC:
        raise ValueError("not a unit index")
    _magic, n_keys, n_positions, n_buckets = _HEADER.unpack_from(data)
    if min(n_keys, n_positions) < 0 or n_buckets < 1:
        raise ValueError("damaged unit index (header)")
    per_direction = 4 * n_keys + 8 * (n_buckets + 1)
    if len(data) != head + 8 * n_keys + 4 * n_positions + N_DIRECTIONS * per_direction + 4:
        raise ValueError("truncated unit index")
    if zlib.crc32(memoryview(data)[:-4]) != struct.unpack_from("<I", data, len(data) - 4)[0]:
        raise ValueError("damaged unit index (CRC-32)")
    keys = np.frombuffer(data, "<i8", n_keys, head)
    at = head + 8 * n_keys
    positions = np.frombuffer(data, "<i4", n_positions, at)
    at += 4 * n_positions
    orders = []
    for _d in range(N_DIRECTIONS):
        order = np.frombuffer(data, "<i4", n_keys, at)
        bounds = np.frombuffer(data, "<i8", n_buckets + 1, at + 4 * n_keys)
        orders.append((order, bounds))
        at += per_direction
    return UnitIndex(keys, positions, int(n_buckets), tuple(orders))


def index_path(root: str, blocks_file: str, row_group: int) -> str:
    """The unit index file of one row group of a blocks file (an fsspec path)."""
    return posixpath.join(root, f"{posixpath.basename(blocks_file)}.rg{row_group:05d}")


def read(fs, root: str, blocks_file: str, row_group: int) -> UnitIndex | None:
    """The stored index of a row group, or None if there is none usable (absent, unreadable or damaged).
    Callers check it against the blocks they read (:meth:`UnitIndex.fits`)."""
    return read_cached(fs, index_path(root, blocks_file, row_group), decode)


def write(fs, root: str, blocks_file: str, row_group: int, index: UnitIndex) -> None:
    """Store a row group's index (whole file or nothing; a failure only loses the cache)."""
    write_cached(fs, index_path(root, blocks_file, row_group), encode(index))
