"""Finding a block's dictionary keys in the whole table (numba).

Both key arrays are sorted, and a block's dictionary is a few percent of the
table, so consecutive keys land close together in it. A galloping search from
the previous key's position (steps 1, 2, 4, ... then a binary search inside the
last step) touches a few neighbouring cache lines per key, where a binary
search over the whole table (``np.searchsorted``) starts from the middle every
time: 3.8x faster measured on a 3.4M-entry table and a 280k-key dictionary.

When most keys have no usable stored position (the first search in a new
table), a hash index of the table's keys (:func:`key_index`, built once per
table) finds them instead: its slot, and then the key's table line, can be
prefetched keys ahead, where each galloping step waits for the one before.
Measured on a 7.7M-entry table and 6.7M keys of 24 blocks, in one process:
20-25 ns per key against 40 ns galloping. Keys the index does not hold still
gallop from the previous key's position, for their insertion point.
"""
from __future__ import annotations

import struct
import zlib
from dataclasses import dataclass

import numpy as np
from numba import njit

from spark_align.kernels.counts import FIBONACCI
from spark_align.kernels.prefetch import AHEAD, prefetch




@njit(cache=True, nogil=True, inline="always")
def _slot(key, size):  # pragma: no cover
    # the top 32 bits of key x 2^64/phi, scaled to 0..size-1 (no power-of-two size needed)
    return np.int64((((np.uint64(key) * FIBONACCI) >> np.uint64(32)) * np.uint64(size)) >> np.uint64(32))


MAX_INDEXED = 2 ** 30  # int32 slots hold positions + 1; larger tables are searched by galloping


def key_index(table_keys: np.ndarray) -> np.ndarray:
    """A hash index of sorted, distinct ``table_keys`` for :func:`find_hinted`: int32 slots holding
    position + 1 (0: empty), twice as many as keys (half full, linear probing): 8 bytes per table
    key; 0.13 s for 10M keys. Fuller, a search reads more wrong candidates in the table: at 61% full,
    31 ns per key against 19 at 30% (bench_kernels, 10.2M entries)."""
    n = len(table_keys)
    if n >= MAX_INDEXED:
        raise ValueError(f"a table of {n} keys is too large to index")
    slots = np.zeros(max(16, 2 * n), np.int32)
    _build_index(np.ascontiguousarray(table_keys, np.int64), slots)
    return slots


@njit(cache=True, nogil=True)
def _build_index(table_keys, slots):  # pragma: no cover
    size = len(slots)
    for p in range(len(table_keys)):
        h = _slot(table_keys[p], size)
        while slots[h] != 0:
            h += 1
            if h == size:
                h = 0
        slots[h] = p + 1


@njit(cache=True, nogil=True)
def _search_kernel(table_keys, keys, hints, index, pos_out, hit_out, table_values, default, values_out,
                   lo_out):  # pragma: no cover
    n = len(table_keys)
    with_values = len(values_out) > 0
    with_hints = len(hints) > 0
    with_index = len(index) > 0
    size = len(index)
    stale = 0
    pos = 0
    for i in range(len(keys)):
        if with_hints and i + AHEAD < len(keys):
            ahead = hints[i + AHEAD]
            if 0 <= ahead < n:
                prefetch(table_keys, ahead)
                if with_values:
                    prefetch(table_values, ahead)
        elif with_index:
            # the slot of the key AHEAD on, then the table line of the key AHEAD / 2 on (its slot
            # prefetched by then)
            if i + AHEAD < len(keys):
                prefetch(index, _slot(keys[i + AHEAD], size))
            if i + AHEAD // 2 < len(keys):
                ahead = index[_slot(keys[i + AHEAD // 2], size)] - 1
                if ahead >= 0:
                    prefetch(table_keys, ahead)
                    if with_values:
                        prefetch(table_values, ahead)
        k = keys[i]
        lo = -1
        found = False
        if with_hints:
            h = hints[i]
            if 0 <= h < n and table_keys[h] == k:  # the usual case: one read
                lo = h
                found = True
            # A hint is the insertion point found before; it still is one if its neighbours bracket k.
            elif 0 <= h <= n and (h == n or table_keys[h] > k) and (h == 0 or table_keys[h - 1] < k):
                lo = h
            else:
                stale += 1
        if lo < 0 and with_index:
            h = _slot(k, size)
            while True:
                p = index[h] - 1
                if p < 0:
                    break
                if table_keys[p] == k:
                    lo = p
                    found = True
                    break
                h += 1
                if h == size:
                    h = 0
        if lo < 0:
            if i > 0 and k < keys[i - 1]:
                pos = 0  # not sorted here: restart (correct for any input, fast for sorted input)
            step = 1
            lo = pos
            hi = pos
            while hi < n and table_keys[hi] < k:
                lo = hi + 1
                hi = hi + step
                step *= 2
            if hi > n:
                hi = n
            while lo < hi:
                mid = (lo + hi) >> 1
                if table_keys[mid] < k:
                    lo = mid + 1
                else:
                    hi = mid
            found = lo < n and table_keys[lo] == k
        pos = lo
        lo_out[i] = lo
        pos_out[i] = lo if lo < n else n - 1
        hit_out[i] = found
        if with_values:
            values_out[i] = table_values[lo] if found else default
    return stale


def positions(table_keys: np.ndarray, keys: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(position, found) of ``keys`` in the sorted ``table_keys``: the index of the first table key
    >= each key (clipped to a valid index), and whether it is equal. Fastest for sorted ``keys``."""
    pos, hit, _, _, _ = _search(table_keys, keys, None, 0.0, None)
    return pos, hit


def find(table_keys: np.ndarray, table_values: np.ndarray, keys: np.ndarray,
         default: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """:func:`positions` and the values found (``default`` where a key is absent), in the same pass:
    the value sits beside the key the search has just read, so it costs no second scattered read."""
    return _search(table_keys, keys, table_values, default, None)[:3]


def find_hinted(table_keys: np.ndarray, table_values: np.ndarray, keys: np.ndarray, default: float,
                hints: np.ndarray | None, index: np.ndarray | None = None
                ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, int]:
    """:func:`find` starting from ``hints``, the insertion points an earlier search returned.

    A hint is checked in the table (one read where the key is there; for an absent key, its two
    neighbours must bracket it), so a wrong or outdated hint can cost time but never change a result;
    only keys whose hint fails are searched for. The table lines of the hints 64 keys ahead are
    prefetched. Returns (positions, found, values, insertion points, number of keys searched for);
    the insertion points are the hints for the next call. ``hints=None``: every key is searched for.
    ``index``: :func:`key_index` of ``table_keys`` (None: none), where keys are searched for first.
    """
    if hints is not None and len(hints) != len(keys):
        raise ValueError(f"{len(hints)} hints for {len(keys)} keys")
    return _search(table_keys, keys, table_values, default, hints, index)


def _search(table_keys, keys, table_values, default, hints, index=None):
    n_values = len(keys) if table_values is not None else 0
    if not (len(table_keys) and len(keys)):
        return (np.zeros(len(keys), np.int64), np.zeros(len(keys), np.bool_), np.full(n_values, default, np.float64),
                np.zeros(len(keys), np.int64), len(keys) if hints is None else 0)
    pos, hit, values, lo = (np.empty(len(keys), np.int64), np.empty(len(keys), np.bool_),
                            np.empty(n_values, np.float64), np.empty(len(keys), np.int64))  # all written
    searched = _search_kernel(
        np.ascontiguousarray(table_keys, np.int64), np.ascontiguousarray(keys, np.int64),
        np.zeros(0, np.int64) if hints is None else np.ascontiguousarray(hints, np.int64),
        np.zeros(0, np.int32) if index is None else index, pos, hit,
        np.zeros(0) if table_values is None else np.ascontiguousarray(table_values, np.float64),
        float(default), values, lo)
    return pos, hit, values, lo, len(keys) if hints is None else int(searched)


# Stored hints: insertion points of a few sorted key runs, so mostly small steps forward. Each step
# 0..254 is one byte; anything else (a new run, a long step) is byte 255 plus the full value in a
# list of int64 exceptions. About 1 byte per key against 8 for the keys themselves, plus one bit per
# key saying whether it was found, and a CRC-32 of the whole.
_HINTS_MAGIC = b"SAHINT02"
_HEADER = struct.Struct("<8sqqq16s")  # magic, keys, exceptions, flags, keys_id
_EXACT = 1
_ESCAPE = 255


@dataclass(frozen=True)
class StoredHints:
    """What a lookup leaves for the next one over the same keys (``engine.hints`` stores it).

    ``points``: each key's insertion point in the table (int64); ``found``: whether the key was there
    (bool; None: not recorded); ``keys_id``: 16 bytes naming the table's keys
    (``engine.tables.DirectionTable.keys_id``; empty: unknown); ``exact``: ``found`` marks exactly the
    keys whose counts the E-step adds, so a table with the same ``keys_id`` needs no search at all.
    """

    points: np.ndarray
    found: np.ndarray | None = None
    keys_id: bytes = b""
    exact: bool = False


def encode_hints(hints: StoredHints) -> bytes:
    """:class:`StoredHints` as bytes for :func:`decode_hints`."""
    points = np.ascontiguousarray(hints.points, np.int64)
    codes, exceptions = np.empty(len(points), np.uint8), np.empty(len(points), np.int64)
    exceptions = exceptions[:_do_steps(points, codes, exceptions)]
    found = np.zeros(len(points), bool) if hints.found is None else np.asarray(hints.found, bool)
    if len(found) != len(points) or len(hints.keys_id) not in (0, 16):
        raise ValueError("found flags or keys id do not fit the points")
    flags = _EXACT if hints.exact and hints.found is not None else 0
    body = b"".join([_HEADER.pack(_HINTS_MAGIC, len(points), len(exceptions), flags, hints.keys_id.ljust(16, b"\0")),
                     exceptions.tobytes(), codes.tobytes(), np.packbits(found).tobytes()])
    return body + struct.pack("<I", zlib.crc32(body))


def decode_hints(data: bytes) -> StoredHints:
    """:func:`encode_hints` undone; ValueError if ``data`` is not a whole, undamaged encoding."""
    head = _HEADER.size
    if len(data) < head + 4 or data[:len(_HINTS_MAGIC)] != _HINTS_MAGIC:
        raise ValueError("not a hints encoding")
    if zlib.crc32(memoryview(data)[:-4]) != struct.unpack_from("<I", data, len(data) - 4)[0]:
        raise ValueError("damaged hints encoding (CRC-32)")
    _magic, n, n_exc, flags, keys_id = _HEADER.unpack_from(data)
    n_bits = (n + 7) // 8
    if n < 0 or n_exc < 0 or len(data) != head + 8 * n_exc + n + n_bits + 4:
        raise ValueError("truncated hints encoding")
    exceptions = np.frombuffer(data, np.int64, n_exc, head)
    codes = np.frombuffer(data, np.uint8, n, head + 8 * n_exc)
    found = np.unpackbits(np.frombuffer(data, np.uint8, n_bits, head + 8 * n_exc + n), count=n).view(bool)
    out = np.empty(n, np.int64)
    if _undo_steps(codes, exceptions, out) != n_exc:
        raise ValueError("inconsistent hints encoding")
    return StoredHints(out, found, b"" if keys_id == bytes(16) else keys_id, bool(flags & _EXACT))


def gather_found(table_values: np.ndarray, points: np.ndarray, found: np.ndarray, block_sizes,
                 default: float) -> np.ndarray | None:
    """``table_values[points[i]]`` where ``found[i]``, else ``default``: the lookup when the positions
    are known (stored hints for a table with the same keys), for the keys of consecutive blocks of
    ``block_sizes`` keys each. None if the points are not what a search of sorted unique keys in a
    sorted table gives (within each block: never going down, going up after a found key, found ones
    inside the table); that is checked before any value is read. The table lines 64 keys ahead are
    prefetched."""
    sizes = np.asarray(block_sizes, np.int64)
    if len(points) != len(found) or int(sizes.sum()) != len(points):
        return None
    out = np.empty(len(points), np.float64)
    ok = _gather(np.ascontiguousarray(table_values, np.float64), np.ascontiguousarray(points, np.int64),
                 np.ascontiguousarray(found, np.bool_), sizes, float(default), out)
    return out if ok else None


@njit(cache=True, nogil=True)
def _gather(table_values, points, found, sizes, default, out):  # pragma: no cover
    n = len(table_values)
    k = 0
    bad = False
    for b in range(len(sizes)):
        # Within a block (sorted keys) the points of a search never go down, and go up after a found
        # key; found points lie below n, others at most at n. Checked first, without a loop-carried
        # dependency, so it runs at memory speed (about 1 ns per key).
        m = sizes[b]
        if m == 0:
            continue
        bad |= points[k] < 0
        for i in range(k, k + m - 1):
            bad |= (points[i + 1] - points[i]) < np.int64(found[i])
        bad |= points[k + m - 1] > n - np.int64(found[k + m - 1])
        k += m
    if bad:
        return False
    m = len(points)
    for i in range(m):
        if i + AHEAD < m and found[i + AHEAD]:
            prefetch(table_values, points[i + AHEAD])
        out[i] = table_values[points[i]] if found[i] else default
    return True


@njit(cache=True, nogil=True)
def _do_steps(points, codes, exceptions):  # pragma: no cover
    # each point as its step from the one before (from 0): one byte while 0..254, else the escape
    # byte and the point itself among the exceptions; returns the number of exceptions
    prev = 0
    used = 0
    for i in range(len(points)):
        step = points[i] - prev
        if 0 <= step < 255:
            codes[i] = step
        else:
            codes[i] = 255
            exceptions[used] = points[i]
            used += 1
        prev = points[i]
    return used


@njit(cache=True, nogil=True)
def _undo_steps(codes, exceptions, out):  # pragma: no cover
    prev = 0
    used = 0
    for i in range(len(codes)):
        c = codes[i]
        if c == 255:
            if used >= len(exceptions):
                return -1
            prev = exceptions[used]
            used += 1
        else:
            prev += c
        out[i] = prev
    return used
