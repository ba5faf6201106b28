"""Finding a block's dictionary keys in the whole table (numba).

Both key arrays are sorted, and a block's dictionary is a few percent of the
table, so consecutive keys land close together in it. A galloping search from
the previous key's position (steps 1, 2, 4, ... then a binary search inside the
last step) touches a few neighbouring cache lines per key, where a binary
search over the whole table (``np.searchsorted``) starts from the middle every
time: 3.8x faster measured on a 3.4M-entry table and a 280k-key dictionary.
"""
from __future__ import annotations

import numpy as np
from numba import njit

from spark_align.kernels.prefetch import AHEAD, prefetch


@njit(cache=True, nogil=True)
def _search_kernel(table_keys, keys, hints, pos_out, hit_out, table_values, default, values_out,
                   lo_out):  # pragma: no cover
    n = len(table_keys)
    with_values = len(values_out) > 0
    with_hints = len(hints) > 0
    stale = 0
    pos = 0
    for i in range(len(keys)):
        if with_hints and i + AHEAD < len(keys):
            ahead = hints[i + AHEAD]
            if 0 <= ahead < n:
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
                hints: np.ndarray | None) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, int]:
    """:func:`find` starting from ``hints``, the insertion points an earlier search returned.

    A hint is checked in the table (one read where the key is there; for an absent key, its two
    neighbours must bracket it), so a wrong or outdated hint can cost time but never change a result;
    only keys whose hint fails are searched for. The table lines of the hints 64 keys ahead are
    prefetched. Returns (positions, found, values, insertion points, number of keys searched for);
    the insertion points are the hints for the next call. ``hints=None``: every key is searched for.
    """
    if hints is not None and len(hints) != len(keys):
        raise ValueError(f"{len(hints)} hints for {len(keys)} keys")
    return _search(table_keys, keys, table_values, default, hints)


def _search(table_keys, keys, table_values, default, hints):
    n_values = len(keys) if table_values is not None else 0
    if not (len(table_keys) and len(keys)):
        return (np.zeros(len(keys), np.int64), np.zeros(len(keys), np.bool_), np.full(n_values, default, np.float64),
                np.zeros(len(keys), np.int64), len(keys) if hints is None else 0)
    pos, hit, values, lo = (np.empty(len(keys), np.int64), np.empty(len(keys), np.bool_),
                            np.empty(n_values, np.float64), np.empty(len(keys), np.int64))  # all written
    searched = _search_kernel(
        np.ascontiguousarray(table_keys, np.int64), np.ascontiguousarray(keys, np.int64),
        np.zeros(0, np.int64) if hints is None else np.ascontiguousarray(hints, np.int64), pos, hit,
        np.zeros(0) if table_values is None else np.ascontiguousarray(table_values, np.float64),
        float(default), values, lo)
    return pos, hit, values, lo, len(keys) if hints is None else int(searched)


# Stored hints: insertion points of a few sorted key runs, so mostly small steps forward. Each step
# 0..254 is one byte; anything else (a new run, a long step) is byte 255 plus the full value in a
# list of int64 exceptions. About 1 byte per key against 8 for the keys themselves.
_HINTS_MAGIC = b"SAHINT01"
_ESCAPE = 255


def encode_hints(insertion_points: np.ndarray) -> bytes:
    """Insertion points (non-negative int64) as bytes for :func:`decode_hints`."""
    points = np.asarray(insertion_points, np.int64)
    steps = np.diff(points, prepend=np.int64(0))
    small = (steps >= 0) & (steps < _ESCAPE)
    codes = np.where(small, steps, _ESCAPE).astype(np.uint8)
    exceptions = points[~small]
    header = np.array([len(points), len(exceptions)], np.int64)
    return _HINTS_MAGIC + header.tobytes() + exceptions.tobytes() + codes.tobytes()


def decode_hints(data: bytes) -> np.ndarray:
    """:func:`encode_hints` undone; ValueError if ``data`` is not a whole encoding."""
    head = len(_HINTS_MAGIC) + 16
    if len(data) < head or data[:len(_HINTS_MAGIC)] != _HINTS_MAGIC:
        raise ValueError("not a hints encoding")
    n, n_exc = (int(x) for x in np.frombuffer(data, np.int64, 2, len(_HINTS_MAGIC)))
    if n < 0 or n_exc < 0 or len(data) != head + 8 * n_exc + n:
        raise ValueError("truncated hints encoding")
    exceptions = np.frombuffer(data, np.int64, n_exc, head)
    codes = np.frombuffer(data, np.uint8, n, head + 8 * n_exc)
    out = np.empty(n, np.int64)
    if _undo_steps(codes, exceptions, out) != n_exc:
        raise ValueError("inconsistent hints encoding")
    return out


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
