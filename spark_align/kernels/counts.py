"""Exact reduction of E-step counts and the M-step normalisation, on numpy arrays.

E-step rows are ``(dir, src, tgt, hi, lo)``: a count split into 64-bit fixed
point (see ``engine.estep``), with ``src >= 0`` for lexical counts, ``src == -1``
for entry ``tgt`` of a model's dense statistics and ``src == -2`` for scalars.
Sums are integer sums, so they do not depend on the order rows arrive in.

Rows are identified by one int64 key ``dir << 62 | (src + 2) << 32 | tgt`` that
sorts as (dir, src, tgt); ids must stay below 2^30 (a billion words).

Functions here take and return arrays only: no Spark, no I/O.
"""
from __future__ import annotations

import numpy as np
from numba import njit
from numba.cpython.unsafe.numbers import leading_zeros

from spark_align.kernels.prefetch import AHEAD, prefetch

MAX_ID = 2 ** 30 - 2  # ids (and dense indexes) must stay below this
_LOW32 = np.int64(0xFFFFFFFF)


def row_keys(dirs: np.ndarray, src: np.ndarray, tgt: np.ndarray) -> np.ndarray:
    """One sortable int64 per row: order (dir, src, tgt)."""
    return ((dirs.astype(np.int64) << 62) | ((src.astype(np.int64) + 2) << 32)
            | tgt.astype(np.int64))


def split_keys(keys: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Inverse of :func:`row_keys`: (dir int8, src int32, tgt int32)."""
    return ((keys >> 62).astype(np.int8), (((keys >> 32) & np.int64(2 ** 30 - 1)) - 2).astype(np.int32),
            (keys & _LOW32).astype(np.int32))


def reduce_sorted(keys: np.ndarray, hi: np.ndarray, lo: np.ndarray):
    """Sum ``hi`` and ``lo`` per distinct key; returns (unique keys ascending, hi sums, lo sums)."""
    if len(keys) == 0:
        return keys.astype(np.int64), hi.astype(np.int64), lo.astype(np.int64)
    # Rows arrive as a few sorted runs (payloads, earlier folds): merged and summed in one compiled
    # pass over the runs, with no sort and no scattered reads (numpy's argsort, gathers and reduceat
    # took 1.12 s against 0.41 s for one of two reducers at 200k pairs). Many runs: a stable sort
    # orders the rows first. The sums are views of arrays as long as the input.
    starts = np.concatenate([[0], np.flatnonzero(keys[1:] < keys[:-1]) + 1]).astype(np.int64)
    ends = np.append(starts[1:], len(keys)).astype(np.int64)
    args = (np.ascontiguousarray(keys, np.int64), np.ascontiguousarray(hi, np.int64),
            np.ascontiguousarray(lo, np.int64))
    if len(starts) > MERGE_RUNS:
        order = np.argsort(keys, kind="stable")
        args = tuple(a[order] for a in args)
        starts, ends = np.zeros(1, np.int64), np.full(1, len(keys), np.int64)
    out = tuple(np.empty(len(keys), np.int64) for _ in range(3))
    m = _merge_runs(*args, starts, ends, *out)
    return tuple(a[:m] for a in out)


MERGE_RUNS = 16  # at most this many sorted runs are merged directly


@njit(cache=True, nogil=True)
def _merge_runs(keys, hi, lo, starts, ends, out_keys, out_hi, out_lo):  # pragma: no cover
    # Runs not yet exhausted are kept first in pos/end, so each row scans only the live runs (most
    # runs in a reducer are a task's few dense-statistic and scalar rows, exhausted early).
    pos = starts.copy()
    end = ends.copy()
    live = 0
    for r in range(len(pos)):
        if pos[r] < end[r]:
            pos[live] = pos[r]
            end[live] = end[r]
            live += 1
    m = -1
    while live > 0:
        best = 0
        best_key = keys[pos[0]]
        for r in range(1, live):
            k = keys[pos[r]]
            if k < best_key:
                best = r
                best_key = k
        j = pos[best]
        pos[best] += 1
        if pos[best] == end[best]:
            live -= 1
            pos[best] = pos[live]
            end[best] = end[live]
        m = _emit(out_keys, out_hi, out_lo, m, best_key, hi[j], lo[j])
    return m + 1


@njit(cache=True, nogil=True, inline="always")
def _emit(out_keys, out_hi, out_lo, m, key, h, lo):  # pragma: no cover
    # add the row to output row m if it has the same key, else start row m + 1; returns the last row
    if m >= 0 and out_keys[m] == key:
        out_hi[m] += h
        out_lo[m] += lo
        return m
    out_keys[m + 1] = key
    out_hi[m + 1] = h
    out_lo[m + 1] = lo
    return m + 1


class CountBuffer:
    """Accumulates (key, hi, lo) rows and folds duplicates when it grows (memory ~ distinct keys).

    ``compact_rows``: fold once this many rows are buffered beyond the last fold's result. Rows come
    as arrays (:meth:`add`) or as payloads (:meth:`add_payload`), which stay encoded (7-8 bytes per
    row instead of 24) until a fold merges them as it decodes them (sorted segments, up to
    :data:`STREAM_RUNS` runs) or decodes them into one allocation and sorts.
    """

    def __init__(self, compact_rows: int = 4_000_000) -> None:
        self.compact_rows = compact_rows
        self._parts: list[tuple[np.ndarray, np.ndarray, np.ndarray]] = []
        self._payloads: list = []
        self._payload_rows = 0
        self._pending = 0
        self._folded = 0

    def add(self, keys: np.ndarray, hi: np.ndarray, lo: np.ndarray) -> None:
        if len(keys) == 0:
            return
        self._parts.append((keys, hi, lo))
        self._grew(len(keys))

    def add_payload(self, data) -> None:
        """Rows of a payload (:func:`decode_rows`); ValueError if it is not one."""
        rows = sum(r for _start, r, _n in _segments(np.frombuffer(data, np.uint8)))
        if rows:
            self._payloads.append(data)
            self._payload_rows += rows
            self._grew(rows)

    @property
    def max_keys(self) -> int:
        """At most this many distinct keys are held: the last fold's, and one per row added since."""
        return self._folded + self._pending

    def _grew(self, rows: int) -> None:
        self._pending += rows
        # more runs than a fold merges directly would make it sort everything
        if self._pending > max(self.compact_rows, self._folded) or len(self._parts) >= MERGE_RUNS:
            self._fold()

    def _fold(self) -> None:
        if self._payloads and len(self._parts) <= 1:
            folded = _merge_payloads(self._parts[0] if self._parts else None, self._payloads, self._payload_rows)
            if folded is not None:
                self._parts, self._payloads, self._payload_rows = [folded], [], 0
                self._folded = len(folded[0])
                self._pending = 0
                return
        if len(self._parts) == 1 and not self._payloads:
            keys, hi, lo = self._parts[0]
        else:
            # one allocation for everything buffered: no concatenation of decoded parts
            n = sum(len(p[0]) for p in self._parts) + self._payload_rows
            keys, hi, lo = (np.empty(n, np.int64) for _ in range(3))
            at = 0
            for part in self._parts:
                for dest, src in zip((keys, hi, lo), part):
                    dest[at:at + len(part[0])] = src
                at += len(part[0])
            for data in self._payloads:
                at = _decode_into(data, keys, hi, lo, at)
        folded = reduce_sorted(keys, hi, lo)
        self._parts, self._payloads, self._payload_rows = [folded], [], 0
        self._folded = len(folded[0])
        self._pending = 0

    def result(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """(unique keys ascending, hi sums, lo sums)."""
        if not self._parts and not self._payloads:
            empty = np.zeros(0, np.int64)
            return empty, empty, empty
        if len(self._parts) > 1 or self._payloads or self._pending:
            self._fold()
        return self._parts[0]


def pair_rows(d: int, pair_keys: np.ndarray, values: np.ndarray, *, hi_scale: float, lo_scale: float):
    """Rows (:func:`row_keys`, hi, lo) of direction ``d`` for block dictionary keys ``src << 32 | tgt`` and
    their float64 values, in one compiled pass: the same integers as ``row_keys`` and splitting with
    ``hi = floor(v * hi_scale)``, ``lo = rint((v * hi_scale - hi) * lo_scale)``. ValueError if an id is
    not below :data:`MAX_ID`."""
    pair_keys = np.ascontiguousarray(pair_keys, np.int64)
    out = tuple(np.empty(len(pair_keys), np.int64) for _ in range(3))
    if not _pair_rows(int(d), pair_keys, np.ascontiguousarray(values, np.float64), float(hi_scale),
                      float(lo_scale), *out):
        raise ValueError(f"word ids must stay below {MAX_ID}")
    return out


@njit(cache=True, nogil=True)
def _pair_rows(d, pair_keys, values, hi_scale, lo_scale, keys, hi, lo):  # pragma: no cover
    top = np.int64(d) << np.int64(62)
    ok = True
    for i in range(len(pair_keys)):
        k = pair_keys[i]
        ok &= ((k >> 32) < MAX_ID) & ((k & 0xFFFFFFFF) < MAX_ID) & (k >= 0)
        keys[i] = top | (k + (np.int64(2) << np.int64(32)))
        scaled = values[i] * hi_scale
        h = np.floor(scaled)
        hi[i] = np.int64(h)
        lo[i] = np.int64(np.rint((scaled - h) * lo_scale))
    return ok


class HashCounts:
    """Sums (key, hi, lo) rows per distinct key as they arrive, in an open-addressing hash table.

    The same sums as :class:`CountBuffer` (integers: the order rows arrive in does not matter), for
    rows that come as many short sorted runs, as an E-step task's do when the table cannot take them
    (the constant first iteration: every key of every block's dictionary). A slot is (key + 1, hi,
    lo) in one row of an (n, 3) array (0: empty, so a new table is plain zeroed memory); the table is
    at most 70% full and doubles in one compiled pass over the old slots. The result sorts the keys
    alone (numpy's sort of int64 is several times faster than an argsort and the gathers after it)
    and then finds each key's sums in the table. Memory: 34 to 69 bytes per distinct key, nothing per
    row. Keys must be non-negative (:func:`row_keys` are).

    Measured on a quarter of a first-iteration E-step task at 1M pairs (16.3M rows in 60 sorted
    runs, 7.2M distinct keys), in one process: the result 0.26-0.32 s against 1.2-1.3 s through an
    argsort and gathers; adding 1.75 s into fresh memory that grows, 0.39 s into a table reused from
    the worker's previous task (:meth:`release`). A whole first-iteration task at 1M pairs (with
    :func:`encode_by_bucket`): 6.0 s, or 4.8 s reusing the table, against 6.2-6.7 s.
    """

    LOAD = 0.7

    def __init__(self, capacity: int = 1 << 16, *, slots: np.ndarray | None = None) -> None:
        """``slots``: an empty table to start from (what :meth:`release` returned), else a new one of
        at least ``capacity`` slots."""
        if slots is not None and (slots.shape[1:] != (3,) or len(slots) & (len(slots) - 1) or len(slots) < 16):
            raise ValueError("hash slots must be an (n, 3) array, n a power of two of at least 16")
        self._slots = slots if slots is not None else np.zeros(
            (max(16, 1 << int(capacity - 1).bit_length()), 3), np.int64)
        self._used = 0

    @property
    def n_keys(self) -> int:
        """Distinct keys held so far."""
        return self._used

    def release(self) -> np.ndarray:
        """The table's slots emptied, for a new :class:`HashCounts` (this one holds nothing after).
        Zeroing memory already in use (0.04 s for 16M slots) is much cheaper than the page faults of
        fresh memory: a table grown to 16M slots in fresh memory took about 1 s more."""
        slots, self._slots, self._used = self._slots, np.zeros((16, 3), np.int64), 0
        slots.fill(0)
        return slots

    def add(self, keys: np.ndarray, hi: np.ndarray, lo: np.ndarray) -> None:
        keys, hi, lo = (np.ascontiguousarray(a, np.int64) for a in (keys, hi, lo))
        if len(keys) and int(keys.min()) < 0:
            raise ValueError("hashed count keys must be non-negative")
        start = 0
        while True:
            # an insert stops when the table is full enough; it doubles and the insert goes on
            start, self._used = _hash_insert(self._slots, keys, hi, lo, start, self._used,
                                             int(len(self._slots) * self.LOAD))
            if start == len(keys):
                return
            bigger = np.zeros((2 * len(self._slots), 3), np.int64)
            _rehash(self._slots, bigger)
            self._slots = bigger

    def result(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """(unique keys ascending, hi sums, lo sums)."""
        keys = np.empty(self._used, np.int64)
        _hash_keys(self._slots, keys)
        keys.sort()
        hi, lo = np.empty(len(keys), np.int64), np.empty(len(keys), np.int64)
        _hash_sums(self._slots, keys, hi, lo)
        return keys, hi, lo


@njit(cache=True, nogil=True, inline="always")
def _hash_shift(capacity):  # pragma: no cover
    bits = 0
    while (1 << bits) < capacity:
        bits += 1
    return np.uint64(64 - bits)


FIBONACCI = np.uint64(0x9E3779B97F4A7C15)  # 2^64 / golden ratio: Fibonacci hashing (here and kernels.lookup)
_HASH_AHEAD = 16  # rows ahead whose slot is prefetched


@njit(cache=True, nogil=True, inline="always")
def _home(key, shift):  # pragma: no cover
    # the home slot of a key: the top bits of key x 2^64/phi
    return np.int64((np.uint64(key) * FIBONACCI) >> shift)


@njit(cache=True, nogil=True)
def _hash_insert(slots, keys, hi, lo, start, used, limit):  # pragma: no cover
    # Fibonacci hashing (the top bits of key x 2^64/phi), linear probing; the slot 16 rows ahead is
    # prefetched. Stops before the table would hold more than ``limit`` keys: (next row, keys held).
    mask = len(slots) - 1
    shift = _hash_shift(len(slots))
    n = len(keys)
    for i in range(start, n):
        if i + _HASH_AHEAD < n:
            prefetch(slots, _home(keys[i + _HASH_AHEAD] + 1, shift))
        k = keys[i] + 1
        h = _home(k, shift)
        while True:
            t = slots[h, 0]
            if t == k:
                slots[h, 1] += hi[i]
                slots[h, 2] += lo[i]
                break
            if t == 0:
                if used == limit:
                    return i, used
                slots[h, 0] = k
                slots[h, 1] = hi[i]
                slots[h, 2] = lo[i]
                used += 1
                break
            h = (h + 1) & mask
    return n, used


@njit(cache=True, nogil=True)
def _rehash(old, new):  # pragma: no cover
    # every live slot of ``old`` into the empty table ``new`` (keys are distinct: no comparisons)
    mask = len(new) - 1
    shift = _hash_shift(len(new))
    for s in range(len(old)):
        if s + _HASH_AHEAD < len(old) and old[s + _HASH_AHEAD, 0] != 0:
            prefetch(new, _home(old[s + _HASH_AHEAD, 0], shift))
        k = old[s, 0]
        if k == 0:
            continue
        h = _home(k, shift)
        while new[h, 0] != 0:
            h = (h + 1) & mask
        new[h, 0] = k
        new[h, 1] = old[s, 1]
        new[h, 2] = old[s, 2]


@njit(cache=True, nogil=True)
def _hash_keys(slots, keys):  # pragma: no cover
    m = 0
    for h in range(len(slots)):
        if slots[h, 0] != 0:
            keys[m] = slots[h, 0] - 1
            m += 1


@njit(cache=True, nogil=True)
def _hash_sums(slots, keys, hi, lo):  # pragma: no cover
    # the sums of every key (all held), its slot prefetched 16 keys ahead
    mask = len(slots) - 1
    shift = _hash_shift(len(slots))
    n = len(keys)
    for i in range(n):
        if i + _HASH_AHEAD < n:
            prefetch(slots, _home(keys[i + _HASH_AHEAD] + 1, shift))
        k = keys[i] + 1
        h = _home(k, shift)
        while slots[h, 0] != k:
            h = (h + 1) & mask
        hi[i] = slots[h, 1]
        lo[i] = slots[h, 2]


def buckets_of(keys: np.ndarray, n_buckets: int) -> np.ndarray:
    """Reducer bucket of each row: every lexical row with the same (dir, conditioning word) lands in
    the same bucket, and so does every row with the same key (dense entries, scalars).

    The conditioning word is ``src`` for direction 0 (forward, t(tgt | src)) and ``tgt`` for
    direction 1; dense and scalar rows (``src < 0``) hash their ``tgt``.
    """
    dirs = keys >> 62
    src = ((keys >> 32) & np.int64(2 ** 30 - 1)) - 2
    cond = np.where((dirs == 0) & (src >= 0), src, keys & _LOW32)
    return bucket_of_cond(cond, dirs, n_buckets)


def bucket_of_cond(cond: np.ndarray, dirs, n_buckets: int) -> np.ndarray:
    """Multiplicative hash of (conditioning word, direction) into ``n_buckets`` (consecutive ids spread)."""
    mixed = (cond.astype(np.uint32) * np.uint32(2) + np.asarray(dirs).astype(np.uint32)) * np.uint32(0x9E3779B1)
    return ((mixed >> np.uint32(8)) % np.uint32(n_buckets)).astype(np.int64)


def from_fixed(hi: np.ndarray, lo: np.ndarray, hi_scale: float, lo_scale: float) -> np.ndarray:
    return hi.astype(np.float64) * (1.0 / hi_scale) + lo.astype(np.float64) * (1.0 / (hi_scale * lo_scale))


def normalise(keys: np.ndarray, hi: np.ndarray, lo: np.ndarray, *, hi_scale: float, lo_scale: float,
              min_prob: float):
    """M-step for the lexical rows of reduced counts (each conditioning word's rows all present).

    ``keys`` ascending and distinct (as :func:`reduce_sorted` gives them). Returns (dir, src, tgt, prob)
    sorted by (dir, src, tgt): prob = count / total of its conditioning word, both read from integer
    sums (:func:`from_fixed`), floored at ``min_prob``. One compiled pass per direction (0.07 s in numpy
    for one reducer's 4.7M rows at 200k pairs, most of it the reverse totals' scattered adds).
    """
    keys, hi, lo = (np.ascontiguousarray(a, np.int64) for a in (keys, hi, lo))
    n_tgt = int((keys & _LOW32).max()) + 1 if len(keys) else 0
    out = (np.empty(len(keys), np.int8), np.empty(len(keys), np.int32), np.empty(len(keys), np.int32),
           np.empty(len(keys), np.float64))
    m = _normalise(keys, hi, lo, 1.0 / hi_scale, 1.0 / (hi_scale * lo_scale), float(min_prob),
                   np.zeros(n_tgt, np.int64), np.zeros(n_tgt, np.int64), *out)
    return tuple(a[:m] for a in out)


@njit(cache=True, nogil=True)
def _normalise(keys, hi, lo, inv_hi, inv_lo, min_prob, t_hi, t_lo, o_dir, o_src, o_tgt, o_prob):  # pragma: no cover
    n = len(keys)
    for i in range(n):  # reverse totals: per target word (direction 1 conditions on tgt)
        k = keys[i]
        if (k >> 62) == 1 and ((k >> 32) & 0x3FFFFFFF) >= 2:
            t = k & 0xFFFFFFFF
            t_hi[t] += hi[i]
            t_lo[t] += lo[i]
    m = 0
    i = 0
    while i < n:
        k = keys[i]
        d = k >> 62
        s = ((k >> 32) & 0x3FFFFFFF) - 2
        if s < 0:  # dense statistics and scalars
            i += 1
            continue
        j = i
        if d == 0:  # forward: the conditioning word's rows are consecutive
            s_hi = 0
            s_lo = 0
            while j < n and (keys[j] >> 32) == (k >> 32):
                s_hi += hi[j]
                s_lo += lo[j]
                j += 1
        else:
            j = i + 1
        for r in range(i, j):
            t = keys[r] & 0xFFFFFFFF
            if d == 0:
                total = s_hi * inv_hi + s_lo * inv_lo
            else:
                total = t_hi[t] * inv_hi + t_lo[t] * inv_lo
            p = (hi[r] * inv_hi + lo[r] * inv_lo) / total
            o_dir[m] = d
            o_src[m] = s
            o_tgt[m] = t
            o_prob[m] = p if (p >= min_prob or p != p) else min_prob
            m += 1
        i = j
    return m


@njit(cache=True, nogil=True)
def _add_at(pos, hit, emitted, values, hi_scale, lo_scale, acc, touched, miss):  # pragma: no cover
    n_miss = 0
    for i in range(len(values)):
        j = i + AHEAD
        if j < len(values) and hit[j]:
            prefetch(acc, pos[j])
            prefetch(touched, pos[j])
        if not emitted[i]:
            continue
        if hit[i]:
            scaled = values[i] * hi_scale
            h = np.floor(scaled)
            p = pos[i]
            acc[p, 0] += np.int64(h)
            acc[p, 1] += np.int64(np.rint((scaled - h) * lo_scale))
            touched[p] = True
        else:
            miss[n_miss] = i
            n_miss += 1
    return n_miss


def add_at_positions(pos: np.ndarray, hit: np.ndarray, emitted: np.ndarray, values: np.ndarray,
                     acc: np.ndarray, touched: np.ndarray, *, hi_scale: float, lo_scale: float) -> np.ndarray:
    """Add ``values[i]`` as fixed point into ``acc[pos[i]] = (hi, lo)`` (an (n, 2) int64 array: both
    halves of an entry share a cache line, half the misses of two arrays) for every ``i`` that is
    ``emitted`` and ``hit``, and mark ``touched[pos[i]]``. Returns the indexes that are emitted but not
    hit (their counts go elsewhere). One compiled pass giving the same integers as splitting with
    ``hi = floor(v * hi_scale)``, ``lo = rint((v * hi_scale - hi) * lo_scale)`` and adding with numpy
    (positions must not repeat within one call)."""
    miss = np.empty(len(values), np.int64)
    n = _add_at(np.ascontiguousarray(pos, np.int64), np.ascontiguousarray(hit, np.bool_),
                np.ascontiguousarray(emitted, np.bool_), np.ascontiguousarray(values, np.float64),
                float(hi_scale), float(lo_scale), acc, touched, miss)
    return miss[:n]


# -- E-step rows as bytes (the shuffle's payloads) ------------------------------------------------
# A payload is one or more segments: a 16-byte header (rows, bytes; little-endian int64) and then, per
# row, three variable-length integers: the key's step from the segment's previous key, hi and lo. Each
# integer is zigzag-mapped (small magnitudes of either sign are small) and written 7 bits per byte,
# low bits first, the top bit set on every byte but the last. Keys arrive as a few sorted runs, so
# steps are mostly one byte; lo (a 30-bit fraction per summand) takes four or five. Measured on one
# E-step task's 4.8M rows at 200k pairs: 7.6 bytes per row, encoded in 0.046 s, against 6.5 bytes and
# 0.33 s for zstd over Arrow columns; decoding takes about as long as zstd's.
_SEGMENT_HEADER = 16
_MAX_ROW_BYTES = 30  # three integers of at most 10 bytes


@njit(cache=True, nogil=True, inline="always")
def _put(out, o, v):  # pragma: no cover
    u = np.uint64((v << np.int64(1)) ^ (v >> np.int64(63)))
    while u >= np.uint64(0x80):
        out[o] = np.uint8((u & np.uint64(0x7F)) | np.uint64(0x80))
        o += 1
        u >>= np.uint64(7)
    out[o] = np.uint8(u)
    return o + 1


@njit(cache=True, nogil=True)
def _encode_rows(keys, hi, lo, out):  # pragma: no cover
    o = _SEGMENT_HEADER
    prev = np.int64(0)
    for i in range(len(keys)):
        o = _put(out, o, keys[i] - prev)
        prev = keys[i]
        o = _put(out, o, hi[i])
        o = _put(out, o, lo[i])
    return o


@njit(cache=True, nogil=True, inline="always")
def _size(v):  # pragma: no cover
    # bytes of _put(v), from the zigzag value's bit length (no data-dependent branch)
    u = np.uint64((v << np.int64(1)) ^ (v >> np.int64(63))) | np.uint64(1)
    return (np.int64(63) - np.int64(leading_zeros(u))) // 7 + 1


@njit(cache=True, nogil=True, inline="always")
def _cond(key, d):  # pragma: no cover
    return key >> np.int64(32) if d == 0 else key & np.int64(0xFFFFFFFF)


@njit(cache=True, nogil=True)
def _touched_pass(index, table_keys, d, bucket_of, shift, acc, rows, at, out, write):  # pragma: no cover
    # write False: count each bucket's rows and bytes into rows and at; True: write the rows of bucket b
    # from out[at[b]] on (at advances)
    prev = np.zeros(len(at), np.int64)
    for p in index:
        k = table_keys[p] + shift
        b = bucket_of[_cond(table_keys[p], d)]
        step = k - prev[b]
        prev[b] = k
        if write:
            o = _put(out, at[b], step)
            o = _put(out, o, acc[p, 0])
            at[b] = _put(out, o, acc[p, 1])
        else:
            at[b] += _size(step) + _size(acc[p, 0]) + _size(acc[p, 1])
            rows[b] += 1


def _segment(out: np.ndarray, n_bytes: int, rows: int) -> bytes:
    out[:_SEGMENT_HEADER] = np.frombuffer(np.array([rows, n_bytes - _SEGMENT_HEADER], "<i8").tobytes(), np.uint8)
    return out[:n_bytes].tobytes()


def encode_rows(keys: np.ndarray, hi: np.ndarray, lo: np.ndarray) -> bytes:
    """Rows (int64 arrays of one length) as one payload segment; exact (see :func:`decode_rows`)."""
    keys, hi, lo = (np.ascontiguousarray(a, np.int64) for a in (keys, hi, lo))
    out = np.empty(_SEGMENT_HEADER + _MAX_ROW_BYTES * len(keys), np.uint8)
    return _segment(out, _encode_rows(keys, hi, lo, out), len(keys))


@njit(cache=True, nogil=True, inline="always")
def _bucket_of_key(key, n_buckets):  # pragma: no cover
    # buckets_of for one row key, in the same unsigned 32-bit arithmetic as bucket_of_cond
    d = key >> np.int64(62)
    src = ((key >> np.int64(32)) & np.int64(2 ** 30 - 1)) - 2
    cond = src if d == 0 and src >= 0 else key & np.int64(0xFFFFFFFF)
    low = np.uint64(0xFFFFFFFF)
    mixed = ((((np.uint64(cond) * np.uint64(2)) + np.uint64(d)) & low) * np.uint64(0x9E3779B1)) & low
    return np.int64((mixed >> np.uint64(8)) % np.uint64(n_buckets))


@njit(cache=True, nogil=True)
def _rows_pass(keys, hi, lo, n_buckets, rows, at, out, write):  # pragma: no cover
    # write False: count each bucket's rows and bytes into rows and at; True: write the rows of bucket b
    # from out[at[b]] on (at advances)
    prev = np.zeros(n_buckets, np.int64)
    for i in range(len(keys)):
        b = _bucket_of_key(keys[i], n_buckets)
        step = keys[i] - prev[b]
        prev[b] = keys[i]
        if write:
            o = _put(out, at[b], step)
            o = _put(out, o, hi[i])
            at[b] = _put(out, o, lo[i])
        else:
            at[b] += _size(step) + _size(hi[i]) + _size(lo[i])
            rows[b] += 1


def encode_by_bucket(keys: np.ndarray, hi: np.ndarray, lo: np.ndarray, n_buckets: int) -> dict[int, bytes]:
    """One payload segment per reducer bucket (:func:`buckets_of`) of the rows, each bucket's rows in
    their order here: the same bytes as grouping the rows by bucket and :func:`encode_rows` per bucket,
    in two compiled passes (sizes, then bytes) with no grouping. For a first-iteration E-step task's
    8.4M folded rows at 1M pairs, in one process: the bucket numbers, grouping and gathers alone took
    1.4 s."""
    keys, hi, lo = (np.ascontiguousarray(a, np.int64) for a in (keys, hi, lo))
    return _segments_by_bucket(lambda rows, at, out, write: _rows_pass(keys, hi, lo, n_buckets, rows, at, out, write),
                               n_buckets)


def _segments_by_bucket(run_pass, n_buckets: int) -> dict[int, bytes]:
    # run_pass(rows, at, out, write): the sizing pass (write False), then the writing pass
    rows, sizes = np.zeros(n_buckets, np.int64), np.zeros(n_buckets, np.int64)
    run_pass(rows, sizes, np.zeros(0, np.uint8), False)
    starts = np.concatenate([[0], np.cumsum(sizes + _SEGMENT_HEADER)])
    out = np.empty(int(starts[-1]), np.uint8)
    run_pass(rows, (starts[:-1] + _SEGMENT_HEADER).astype(np.int64), out, True)
    segments = {}
    for b in np.flatnonzero(rows):
        start = int(starts[b])
        out[start:start + _SEGMENT_HEADER] = np.frombuffer(np.array([rows[b], sizes[b]], "<i8").tobytes(), np.uint8)
        segments[int(b)] = out[start:int(starts[b + 1])].tobytes()
    return segments


def encode_touched(touched: np.ndarray, table_keys: np.ndarray, d: int, n_buckets: int,
                   acc: np.ndarray) -> dict[int, bytes]:
    """One payload segment per reducer bucket (:func:`bucket_of_cond`) of direction ``d``'s rows
    ``(row key of table_keys[p], acc[p, 0], acc[p, 1])`` for every table position ``p`` where
    ``touched[p]``, keys ascending within each bucket.

    Two passes over the touched positions in table order (sizes, then bytes), with no gather in bucket
    order: 0.133 s against 0.150 s for gathering by bucket then encoding, for one E-step task's 4.8M
    rows at 200k pairs (same bytes). Memory: the encoded rows, once.
    """
    table_keys, bucket_of, shift = _table_buckets(table_keys, d, n_buckets)
    # the touched positions first, vectorised (10% faster than a branch per table entry in the passes)
    args = (np.flatnonzero(touched), table_keys, int(d), bucket_of, shift, np.ascontiguousarray(acc, np.int64))
    return _segments_by_bucket(lambda rows, at, out, write: _touched_pass(*args, rows, at, out, write), n_buckets)


def _table_buckets(table_keys: np.ndarray, d: int, n_buckets: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """For direction ``d``'s table keys: (the keys as contiguous int64, every conditioning word's
    bucket (:func:`bucket_of_cond`, computed once per word), what turns a table key into its row key)."""
    table_keys = np.ascontiguousarray(table_keys, np.int64)
    n_cond = 0
    if len(table_keys):
        n_cond = int(table_keys.max() >> 32 if d == 0 else (table_keys & 0xFFFFFFFF).max()) + 1
    bucket_of = bucket_of_cond(np.arange(n_cond), d, n_buckets).astype(np.int32)
    return table_keys, bucket_of, (np.int64(d) << np.int64(62)) + (np.int64(2) << np.int64(32))


def touched_rows(touched: np.ndarray, table_keys: np.ndarray, d: int,
                 acc: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Direction ``d``'s rows ``(row key of table_keys[p], acc[p, 0], acc[p, 1])`` for every table
    position ``p`` where ``touched[p]``, keys ascending (the rows :func:`encode_touched` encodes)."""
    index = np.flatnonzero(touched)
    shift = (np.int64(d) << np.int64(62)) + (np.int64(2) << np.int64(32))  # table key -> row key
    return np.asarray(table_keys, np.int64)[index] + shift, acc[index, 0], acc[index, 1]


def touched_in_bucket(touched: np.ndarray, table_keys: np.ndarray, d: int, n_buckets: int, acc: np.ndarray,
                      bucket: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The rows :func:`touched_rows` gives that fall in reducer bucket ``bucket`` (:func:`bucket_of_cond`),
    keys ascending: two compiled passes over the table (count, then copy). Memory: that bucket's rows
    only. A task that writes every bucket itself takes them one bucket at a time, so its arrays stay
    bucket-sized (small enough for the C heap to hand back to the next bucket, rather than fresh memory
    whose first touch page-faults)."""
    table_keys, bucket_of, shift = _table_buckets(table_keys, d, n_buckets)
    args = (touched, table_keys, int(d), bucket_of, int(bucket), shift, np.ascontiguousarray(acc, np.int64))
    keys, hi, lo = (np.empty(_touched_in_bucket(*args, None, None, None), np.int64) for _ in range(3))
    _touched_in_bucket(*args, keys, hi, lo)
    return keys, hi, lo


@njit(cache=True, nogil=True)
def _touched_in_bucket(touched, table_keys, d, bucket_of, bucket, shift, acc, keys, hi, lo):  # pragma: no cover
    # keys None: count the bucket's rows; else copy them
    n = 0
    for p in range(len(touched)):
        if touched[p] and bucket_of[_cond(table_keys[p], d)] == bucket:
            if keys is not None:
                keys[n] = table_keys[p] + shift
                hi[n] = acc[p, 0]
                lo[n] = acc[p, 1]
            n += 1
    return n


@njit(cache=True, nogil=True, inline="always")
def _get(data, o, end):  # pragma: no cover
    u = np.uint64(0)
    s = np.uint64(0)
    while True:
        if o >= end or s > np.uint64(63):
            return np.int64(0), -1
        b = np.uint64(data[o])
        o += 1
        u |= (b & np.uint64(0x7F)) << s
        if b < np.uint64(0x80):
            break
        s += np.uint64(7)
    return np.int64(u >> np.uint64(1)) ^ -np.int64(u & np.uint64(1)), o


@njit(cache=True, nogil=True)
def _decode_rows(data, o, end, rows, keys, hi, lo, at):  # pragma: no cover
    # The row's three reads are written out here and in _merge_segments: one helper returning the row
    # as a tuple made both 2-3x slower (0.20 s against 0.07 s for 4.6M rows).
    prev = np.int64(0)
    for i in range(at, at + rows):
        step, o = _get(data, o, end)
        if o < 0:
            return -1
        prev += step
        keys[i] = prev
        hi[i], o = _get(data, o, end)
        if o < 0:
            return -1
        lo[i], o = _get(data, o, end)
        if o < 0:
            return -1
    return o


# At most this many runs (segments + the folded arrays) are merged as they are decoded. A reducer at
# 1M pairs (4 tasks, 16 segments, 14M rows) merged them in 0.20 s this way, against 0.30 s decoding
# into arrays plus 0.32 s merging those (the decoded copy was 336 MB of fresh memory).
STREAM_RUNS = 32


def _merge_payloads(folded, payloads: list, payload_rows: int):
    """``folded`` (sorted distinct arrays, or None) and the payloads' segments merged and summed in one
    pass that decodes each segment as it goes, with no decoded copy of the payloads; None if that does
    not apply (more runs than :data:`STREAM_RUNS`, or a segment whose keys are not ascending), and then
    the caller decodes and sorts. ValueError if a payload is damaged."""
    segments = []
    offset = 0
    for data in payloads:
        buf = np.frombuffer(data, np.uint8)
        segments.extend((offset + start, offset + start + n_bytes, rows) for start, rows, n_bytes in _segments(buf))
        offset += len(buf)
    if len(segments) + 1 > STREAM_RUNS:
        return None
    fk, fh, fl = folded if folded is not None else (np.zeros(0, np.int64),) * 3
    starts, ends, rows = (np.array([seg[i] for seg in segments], np.int64) for i in range(3))
    n = len(fk) + payload_rows
    out = tuple(np.empty(n, np.int64) for _ in range(3))
    m = _merge_segments(np.frombuffer(b"".join(payloads), np.uint8), starts, ends, rows, fk, fh, fl, *out)
    if m == -2:
        return None
    if m < 0:
        raise ValueError("payload segment does not hold the rows its header says")
    return tuple(a[:m] for a in out)


@njit(cache=True, nogil=True)
def _merge_segments(data, starts, ends, rows, fk, fh, fl, out_keys, out_hi, out_lo):  # pragma: no cover
    # Run 0 is the folded arrays, runs 1.. the segments; each live run's next row is decoded ahead
    # (head_*). Returns the number of rows written, -1 for a damaged segment, -2 for keys that go
    # down within a segment (not a sorted run).
    k = len(starts) + 1
    run = np.empty(k, np.int64)
    pos = np.empty(k, np.int64)
    end = np.empty(k, np.int64)
    left = np.empty(k, np.int64)
    head_key = np.empty(k, np.int64)
    head_hi = np.empty(k, np.int64)
    head_lo = np.empty(k, np.int64)
    live = 0
    if len(fk):
        run[0], pos[0], end[0], left[0] = 0, 1, len(fk), len(fk) - 1
        head_key[0], head_hi[0], head_lo[0] = fk[0], fh[0], fl[0]
        live = 1
    for s in range(len(starts)):
        if rows[s] == 0:
            if starts[s] != ends[s]:
                return -1
            continue
        step, o = _get(data, starts[s], ends[s])
        if o < 0:
            return -1
        h, o = _get(data, o, ends[s])
        if o < 0:
            return -1
        lo_, o = _get(data, o, ends[s])
        if o < 0:
            return -1
        run[live], pos[live], end[live], left[live] = s + 1, o, ends[s], rows[s] - 1
        head_key[live], head_hi[live], head_lo[live] = step, h, lo_
        live += 1
    m = -1
    while live > 0:
        best = 0
        best_key = head_key[0]
        for r in range(1, live):
            if head_key[r] < best_key:
                best = r
                best_key = head_key[r]
        m = _emit(out_keys, out_hi, out_lo, m, best_key, head_hi[best], head_lo[best])
        if left[best] == 0:  # exhausted: the last live run takes its place
            if run[best] > 0 and pos[best] != end[best]:
                return -1
            live -= 1
            run[best], pos[best], end[best], left[best] = run[live], pos[live], end[live], left[live]
            head_key[best], head_hi[best], head_lo[best] = head_key[live], head_hi[live], head_lo[live]
            continue
        left[best] -= 1
        if run[best] == 0:
            i = pos[best]
            head_key[best], head_hi[best], head_lo[best] = fk[i], fh[i], fl[i]
            pos[best] = i + 1
            continue
        step, o = _get(data, pos[best], end[best])
        if o < 0:
            return -1
        key = head_key[best] + step
        if key < head_key[best]:
            return -2
        h, o = _get(data, o, end[best])
        if o < 0:
            return -1
        lo_, o = _get(data, o, end[best])
        if o < 0:
            return -1
        head_key[best], head_hi[best], head_lo[best], pos[best] = key, h, lo_, o
    return m + 1


def _segments(buf: np.ndarray) -> list[tuple[int, int, int]]:
    """(start of rows, rows, bytes) of every segment of a payload; ValueError if a header does not fit."""
    segments, o = [], 0
    while o < len(buf):
        if o + _SEGMENT_HEADER > len(buf):
            raise ValueError("truncated payload segment header")
        rows, n_bytes = (int(x) for x in np.frombuffer(buf, "<i8", 2, o))
        if rows < 0 or n_bytes < 0 or o + _SEGMENT_HEADER + n_bytes > len(buf):
            raise ValueError("payload segment header does not fit the payload")
        segments.append((o + _SEGMENT_HEADER, rows, n_bytes))
        o += _SEGMENT_HEADER + n_bytes
    return segments


def _decode_into(data, keys: np.ndarray, hi: np.ndarray, lo: np.ndarray, at: int) -> int:
    """Decode a payload's rows into the arrays from index ``at``; returns the index after them."""
    buf = np.frombuffer(data, np.uint8)
    for start, rows, n_bytes in _segments(buf):
        if at + rows > len(keys) or _decode_rows(buf, start, start + n_bytes, rows, keys, hi, lo, at) != start + n_bytes:
            raise ValueError("payload segment does not hold the rows its header says")
        at += rows
    return at


def decode_rows(data) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(keys, hi, lo) of a payload (segments of :func:`encode_rows` / :func:`encode_touched`, joined);
    ValueError if ``data`` is not one."""
    n = sum(rows for _start, rows, _n in _segments(np.frombuffer(data, np.uint8)))
    keys, hi, lo = (np.empty(n, np.int64) for _ in range(3))
    _decode_into(data, keys, hi, lo, 0)
    return keys, hi, lo
