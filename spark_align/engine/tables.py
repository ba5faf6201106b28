"""Getting the lexical table to the E-step tasks (the decision that decides scale).

The table is stored long-form in each checkpoint: rows (dir, src, tgt, prob)
with dir 0 = forward t(tgt | src) and dir 1 = reverse t(src | tgt); only pairs
that co-occur in some sentence pair (plus NULL pairs) exist.

Whole-table shipping (this module, ``--shipping broadcast``): every executor
Python worker reads the checkpoint's table files itself (pyarrow through
fsspec, :class:`TableSource`) once per iteration and turns each direction into
two numpy arrays sorted by key (int64 key + float64 probability = 16 bytes per
entry; with the E-step's count accumulators about 48, see ``engine.shipping``).
Memory per executor = that x table entries x Python workers on that executor
(plus the Arrow read while it is converted); the driver holds nothing
table-sized. Each block then looks up only its own dictionary (a galloping
search, ``kernels.lookup``: both key lists are sorted) and runs
its E-step on that local slice, so the per-link lookup in the kernel is a
gather from a small array. Executors therefore need the fsspec backend of the
run directory's storage (s3fs for ``s3a://`` run directories, for example).

Per-block shipping (``engine.shipping``): when the table is larger than a
budget (``--shipping auto``, 48 bytes x entries > ``--table-budget-mb``) or
when forced (``--shipping join``), each block instead receives only its own
dictionary's entries through a Spark join, and nothing table-sized is held by
the driver or by any task. Both paths give every block the same local vector
(``MIN_PROB`` for keys absent from the table, e.g. pruned ones), so results are
bit-identical. The decoding pass of the output (``engine.output``) reads the
table through :class:`TableSource` too.
"""
from __future__ import annotations

import posixpath
import threading
from dataclasses import dataclass, field

import numpy as np

from spark_align.kernels import ragged

DIRS = ("forward", "reverse")
MIN_PROB = 1e-12  # floor applied after each M-step (common practice, no source)


_INDEX_LOCK = threading.Lock()


@dataclass(frozen=True)
class DirectionTable:
    """Sorted keys and their probabilities for one direction, or a constant (uniform init)."""

    keys: np.ndarray | None
    probs: np.ndarray | None
    constant: float | None = None
    keys_id: bytes = b""  # 16 bytes naming ``keys`` (TableLayout.keys_id); empty: unknown
    # the hash index of ``keys`` (kernels.lookup.key_index), built by the first search that needs it
    _index: dict = field(default_factory=dict, repr=False, compare=False)

    def local(self, dict_keys: np.ndarray) -> np.ndarray:
        """Probabilities of a block dictionary's entries (MIN_PROB where a key is unknown)."""
        return self.find(dict_keys)[1]

    def positions(self, dict_keys: np.ndarray) -> tuple[np.ndarray, np.ndarray] | None:
        """(position in the table, found) of each key; None for a constant table.

        The E-step looks keys up once and reuses the positions to add the block's counts into
        table-aligned accumulators (``engine.mstep.TaskCounts``).
        """
        return self.find(dict_keys)[0]

    def find(self, dict_keys: np.ndarray) -> tuple[tuple[np.ndarray, np.ndarray] | None, np.ndarray]:
        """(:meth:`positions`, :meth:`local`) in one pass over the table."""
        return self.find_hinted(dict_keys, None)[:2]

    def find_hinted(self, dict_keys: np.ndarray, hints: np.ndarray | None):
        """:meth:`find` starting from stored hints (``engine.hints``; None: none); also returns the
        insertion points (the next hints) and how many keys had to be searched for. A constant table
        has no positions: (None, probabilities, None, 0).

        Without hints, keys are found through the table's hash index (built on first use, kept with
        the table: 8 bytes per entry) when they are at least 1/64 of the table, as a block's
        dictionary is; fewer keys, and tables of 2^30 entries or more, gallop without it."""
        if self.constant is not None:
            return None, np.full(len(dict_keys), self.constant), None, 0
        from spark_align.kernels import lookup

        index = None
        worth_it = 64 * len(dict_keys) >= len(self.keys) and len(self.keys) < lookup.MAX_INDEXED
        if hints is None and (self._index or worth_it):
            with _INDEX_LOCK:  # the threads of an E-step task share the table: one index, built once
                if not self._index:
                    self._index["slots"] = lookup.key_index(self.keys)
            index = self._index["slots"]
        pos, hit, probs, points, searched = lookup.find_hinted(self.keys, self.probs, dict_keys, MIN_PROB, hints,
                                                               index)
        return (pos, hit), probs, points, searched


def uniform_tables(directions: tuple[str, ...], src_vocab_size: int, tgt_vocab_size: int) -> dict[str, DirectionTable]:
    """Uniform initial tables: t(f | e) = 1 / |V_f| (the NULL id is not counted)."""
    size = {"forward": tgt_vocab_size, "reverse": src_vocab_size}
    return {d: DirectionTable(None, None, 1.0 / size[d]) for d in directions}


class Held:
    """Stands in for a broadcast variable over tables already at hand (``.value``): the driver's, when
    it decodes gold pairs, or one unit's routed entries (``engine.shipping``)."""

    def __init__(self, value) -> None:
        self.value = value

    def load(self, threads: int = 1):
        return self.value


_WORKER_CACHE: dict = {}
_LAYOUT = "layout"  # the cache's entry for the last table's TableLayout
_SCRATCH = "scratch"  # the cache's entry for worker_scratch()


@dataclass(frozen=True)
class TableSource:
    """Stands in for a broadcast of the whole table, without the driver ever holding it.

    ``.value`` (what tasks call, as on a broadcast variable) reads the table where it is used:
    each Python worker reads the checkpoint's Parquet files once (pyarrow through fsspec) and keeps
    only the table it read last. ``token`` is unique per :func:`table_source` call, so a table
    directory written again (``--resume-from``) is never served from an older read.
    """

    url: str | None                 # fsspec URL of the table directory; None = uniform initial table
    directions: tuple[str, ...]
    vocab_sizes: tuple[int, int]    # (source, target): the uniform table's constants
    token: str

    @property
    def value(self) -> dict[str, DirectionTable]:
        return self.load()

    def load(self, threads: int = 1) -> dict[str, DirectionTable]:
        """:attr:`value`, read (if this worker has not yet) with ``threads`` files at a time."""
        key = (self.url, self.directions, self.vocab_sizes, self.token)
        if key not in _WORKER_CACHE:
            previous = _WORKER_CACHE.pop(_LAYOUT, None)
            scratch = _WORKER_CACHE.pop(_SCRATCH, None)
            _WORKER_CACHE.clear()  # free the previous table before reading the next
            if self.url is None:
                scratch = None
                _WORKER_CACHE[key] = uniform_tables(self.directions, *self.vocab_sizes)
            else:
                layout = TableLayout.read(self.url)
                if previous is not None and not previous.same_keys(layout, self.directions):
                    previous = scratch = None  # free the previous keys and scratch before reading new ones
                if scratch:  # the same keys: arrays of the same sizes, kept rather than touched afresh
                    _WORKER_CACHE[_SCRATCH] = scratch
                _WORKER_CACHE[key] = read_worker_tables(self.url, self.directions, layout=layout,
                                                        previous=previous, threads=threads)
                _WORKER_CACHE[_LAYOUT] = layout
        return _WORKER_CACHE[key]

    def unpersist(self) -> None:
        """Nothing to free on the driver (kept so callers can treat it like a broadcast)."""


def worker_scratch() -> dict:
    """Arrays a Python worker keeps between tasks for as long as it keeps its current table, and for
    the next table if that has the same keys (sized by them). Freed before a table with other keys is
    read, so they never outlive the keys they were sized for. Memory allocated afresh costs its first
    touch (page faults): the E-step's accumulators at 1M pairs are half a GB per thread."""
    return _WORKER_CACHE.setdefault(_SCRATCH, {})


_MALLOC_TUNED: list[bool] = []
_M_TRIM_THRESHOLD, _M_MMAP_THRESHOLD, _M_ARENA_MAX = -1, -3, -8  # mallopt parameters, from glibc's malloc.h
_MMAP_THRESHOLD = 32 << 20  # glibc's largest
_TRIM_THRESHOLD = (1 << 31) - 1


def keep_freed_memory() -> None:
    """Have this process's C allocator keep memory it frees for its next allocations (glibc only; a
    no-op elsewhere, and after the first call).

    Python workers live for many tasks and allocate and free arrays of a few MB all the time (every
    block decoded). glibc's defaults hand such blocks straight back to the kernel (``mmap`` below a
    threshold that only grows up to 32 MB, and heap trimming), so each new array is fresh memory
    whose first touch page-faults, which on the machines measured cost as much as writing it several
    times. Allocations up to 32 MB now come from the heap, and the heap is not trimmed: a worker's
    resident memory stays at its peak between tasks instead of shrinking and growing again. Measured
    in one process at 1M pairs: decoding 32,768 pairs took 0.99 s against 1.16 s.

    The threads of a task (``estepThreads``) allocate from the same heap: glibc would otherwise give
    each thread an arena of its own, fresh memory again. The one-task M-step on two threads at 1M
    pairs took 1.0 s with one arena from the process's start (``MALLOC_ARENA_MAX=1``, which
    ``engine.session.get_session`` sets for Python workers) against 1.8 s (about 400 page faults
    against 13,000); limited here, after imports have made arenas, 1.4 s.
    """
    if _MALLOC_TUNED:
        return
    _MALLOC_TUNED.append(True)
    import ctypes

    try:
        mallopt = ctypes.CDLL(None).mallopt
    except (OSError, AttributeError):  # not glibc
        return
    mallopt.argtypes, mallopt.restype = [ctypes.c_int, ctypes.c_int], ctypes.c_int
    mallopt(_M_MMAP_THRESHOLD, _MMAP_THRESHOLD)
    mallopt(_M_TRIM_THRESHOLD, _TRIM_THRESHOLD)
    mallopt(_M_ARENA_MAX, 1)


def table_source(table_path: str | None, directions: tuple[str, ...], src_vocab_size: int,
                 tgt_vocab_size: int) -> TableSource:
    """A :class:`TableSource` for a checkpoint table (a Spark path/URL), or the uniform table if None."""
    import uuid

    from spark_align.store import fsspec_url

    url = None if table_path is None else fsspec_url(table_path)
    return TableSource(url, tuple(directions), (src_vocab_size, tgt_vocab_size), uuid.uuid4().hex)


def read_table_arrow(url: str):
    """A table directory (fsspec URL) as Arrow, skipping ``_``/``.`` entries (``_temporary``)."""
    import fsspec
    import pyarrow.parquet as pq

    fs, root = fsspec.core.url_to_fs(url)
    return pq.read_table(root, filesystem=fs, columns=["dir", "src", "tgt", "prob"])


# Schema metadata of a reducer's table file: its bucket, the number of buckets and a digest of its
# keys, i.e. of its (dir, src, tgt) columns (``engine.mstep``).
BUCKET_META, BUCKETS_META, KEYS_META = b"spark_align.bucket", b"spark_align.buckets", b"spark_align.keys"


def keys_digest(dirs: np.ndarray, src: np.ndarray, tgt: np.ndarray) -> str:
    """A table file's key digest (BLAKE2b, 128 bits) over its dir, src and tgt columns."""
    import hashlib

    h = hashlib.blake2b(digest_size=16)
    for column in (dirs, src, tgt):
        h.update(np.ascontiguousarray(column).view(np.uint8))
    return h.hexdigest()


@dataclass
class TableLayout:
    """What a table directory's file footers say: file names, each file's schema metadata, and (once
    read) each file's rows per direction; plus, after :func:`read_worker_tables`, the merge of the
    files into each direction's sorted keys (``merged[d] = (keys, order)``), so the next
    table with the same keys needs only its probabilities read."""

    url: str
    names: list[str]
    metas: list[dict]
    spans: list[dict] | None = None
    merged: dict | None = None

    @classmethod
    def read(cls, url: str) -> "TableLayout":
        import fsspec
        import pyarrow.parquet as pq

        fs, root = fsspec.core.url_to_fs(url)
        names = sorted(posixpath.basename(p.rstrip("/")) for p in fs.ls(root, detail=False))
        names = [n for n in names if not n.startswith(("_", "."))]
        metas = []
        for name in names:
            with fs.open(posixpath.join(root, name), "rb") as fh:
                metas.append(pq.read_schema(fh).metadata or {})
        return cls(url, names, metas)

    @property
    def bucketed(self) -> bool:
        """True if every file is one reducer bucket's sorted run, in bucket order."""
        return bool(self.names) and all(
            m.get(BUCKET_META) == str(i).encode() and m.get(BUCKETS_META) == str(len(self.names)).encode()
            for i, m in enumerate(self.metas))

    def keys_id(self, direction: str) -> bytes:
        """16 bytes naming one direction's keys: a digest of the files' key digests (equal ids, equal
        keys), or empty if a file has no key digest."""
        import hashlib

        if not (self.bucketed and all(KEYS_META in m for m in self.metas)):
            return b""
        h = hashlib.blake2b(direction.encode(), digest_size=16)
        for m in self.metas:
            h.update(m[KEYS_META])
        return h.digest()

    def same_keys(self, other: "TableLayout", directions: tuple[str, ...]) -> bool:
        """True if ``other`` holds the same keys file by file (equal key digests) and this layout knows
        its merge for ``directions``."""
        return (self.merged is not None and self.spans is not None and set(directions) <= set(self.merged)
                and self.bucketed and other.bucketed and len(self.names) == len(other.names)
                and all(KEYS_META in a and a.get(KEYS_META) == b.get(KEYS_META)
                        for a, b in zip(self.metas, other.metas)))


def read_worker_tables(url: str, directions: tuple[str, ...], *, layout: TableLayout | None = None,
                       previous: TableLayout | None = None, threads: int = 1) -> dict[str, DirectionTable]:
    """A checkpoint table as the E-step uses it, read from the reducers' files one at a time.

    Each reducer file holds one bucket's rows sorted by (dir, src, tgt) and names its bucket in its
    metadata. Concatenated in bucket order, each direction's keys are a few sorted runs, which a
    stable sort merges quickly. Tables without that metadata (written by an older version) are read
    whole.

    ``previous``: the layout of a table with the same keys (:meth:`TableLayout.same_keys`, which the
    caller has checked); then only the ``prob`` column is read, and the keys and their merge are
    shared with the previous table. Without pruning, every table after the first has the same keys.
    ``layout`` (this table's footers, if already read) is completed with what the read learns.
    ``threads``: files read at once (the reads release the GIL).
    """
    import fsspec
    import pyarrow.parquet as pq

    layout = layout or TableLayout.read(url)
    if not layout.bucketed:
        return tables_from_arrow(read_table_arrow(url), directions)
    fs, root = fsspec.core.url_to_fs(url)

    def read(name: str, columns: list[str]) -> list[np.ndarray]:
        with fs.open(posixpath.join(root, name), "rb") as fh:
            part = pq.read_table(fh, columns=columns)
        return [part.column(i).to_numpy() for i in range(len(columns))]

    if previous is not None:
        runs_p: dict[str, list] = {d: [] for d in directions}
        probs = map_threads(lambda name: read(name, ["prob"])[0], layout.names, threads)
        for prob, span in zip(probs, previous.spans):
            for d in directions:
                runs_p[d].append(prob[span[d][0]:span[d][1]])

        def gather(d: str) -> DirectionTable:
            keys, order = previous.merged[d]
            return DirectionTable(keys, np.concatenate(runs_p[d])[order], keys_id=layout.keys_id(d))

        out = dict(zip(directions, map_threads(gather, list(directions), threads)))
        layout.spans, layout.merged = previous.spans, previous.merged
        return out

    def read_runs(name: str) -> tuple[dict, dict]:
        # one file's row span and (keys, probabilities) per direction; its other columns are freed here
        dir_col, src, tgt, prob = read(name, ["dir", "src", "tgt", "prob"])
        span = {d: direction_span(dir_col, DIRS.index(d)) for d in directions}  # sorted by dir first
        return span, {d: (ragged.make_key(src[lo:hi], tgt[lo:hi]), prob[lo:hi]) for d, (lo, hi) in span.items()}

    spans, runs = zip(*map_threads(read_runs, layout.names, threads))

    def merge(d: str) -> DirectionTable:
        keys, probs = (np.concatenate(x) for x in zip(*(run[d] for run in runs)))
        order = np.argsort(keys, kind="stable")  # merges the runs: 0.04-0.07 s for 3.4M entries
        return DirectionTable(keys[order], probs[order], keys_id=layout.keys_id(d)), order

    out, merged = {}, {}
    for d, (table, order) in zip(directions, map_threads(merge, list(directions), threads)):
        out[d] = table
        merged[d] = (table.keys, order)  # position k of the sorted table came from row order[k] of the files
    layout.spans, layout.merged = list(spans), merged
    return out


def direction_span(dir_col: np.ndarray, d: int) -> tuple[int, int]:
    """(first, end) rows of direction ``d`` in a column sorted by direction. The values searched for
    have the column's type: numpy would otherwise copy the whole column to a wider one (0.08 s at 8M
    rows, against microseconds)."""
    lo, hi = np.searchsorted(dir_col, np.array([d, d + 1], dtype=dir_col.dtype))
    return int(lo), int(hi)


def map_threads(fn, items: list, threads: int) -> list:
    """``[fn(x) for x in items]``, on up to ``threads`` threads (for work that releases the GIL)."""
    if threads <= 1 or len(items) <= 1:
        return [fn(x) for x in items]
    from concurrent.futures import ThreadPoolExecutor

    with ThreadPoolExecutor(min(threads, len(items))) as pool:
        return list(pool.map(fn, items))


def _read_parquet_on_driver(spark, path: str):
    """The table as Arrow: read directly through fsspec when the driver can, else through Spark.

    Collecting through Spark costs seconds per million entries (rows travel JVM -> Arrow); a direct
    pyarrow read of the same files is an order of magnitude faster. Spark remains the fallback for
    storage only Spark is configured for (no fsspec backend installed on the driver).
    """
    from spark_align.store import fsspec_url

    try:
        return read_table_arrow(fsspec_url(path))
    except (ImportError, OSError, ValueError):
        return spark.read.parquet(path).toArrow()


def read_tables(spark, path: str, directions: tuple[str, ...]) -> dict[str, DirectionTable]:
    """Load a checkpoint table for broadcasting (see the module docstring for the cost)."""
    return tables_from_arrow(_read_parquet_on_driver(spark, path), directions)


def tables_from_arrow(table, directions: tuple[str, ...]) -> dict[str, DirectionTable]:
    """Arrow rows (dir, src, tgt, prob) -> one key-sorted :class:`DirectionTable` per direction."""
    dir_col = table.column("dir").to_numpy()
    keys_all = ragged.make_key(table.column("src").to_numpy(), table.column("tgt").to_numpy())
    probs_all = table.column("prob").to_numpy()
    out = {}
    for d in directions:
        sel = dir_col == DIRS.index(d)
        keys, probs = keys_all[sel], probs_all[sel]
        order = np.argsort(keys, kind="stable")
        out[d] = DirectionTable(keys[order], probs[order])
    return out
