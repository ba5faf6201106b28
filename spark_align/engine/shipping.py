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
each E-step task receives only the entries its blocks need, through Spark's
shuffle, as opaque bytes (no SQL join). The table is already split into the
reducers' buckets (one file per bucket, by conditioning word). The *routes*
say which entries each unit of work (one row group of encoded blocks,
``mstep.block_units``) needs from each bucket: file ``P`` of
``encoded/routes/<buckets>/`` holds, per direction, every distinct dictionary
key of every unit whose entry lies in bucket ``P``, sorted by (unit, key). They
do not change between iterations, so they are written once per run (and number
of buckets), committed by ``encoded/routes/<buckets>.json``. Per iteration::

    lookup task P: table file P + routes file P -> (unit, that unit's probabilities from bucket P)
    shuffle to the unit's E-step task, sorted by unit     (repartitionAndSortWithinPartitions)
    E-step task:   one unit at a time: its blocks (read from Parquet) + its records

A table in other buckets (the seeded random start, or one written by another
number of reducers) first goes to the lookup tasks by bucket, through a shuffle.
Without pruning the table's keys stay the same from the second iteration on, so
a lookup keeps where each routes key sat in its table file
(:class:`RoutePositions`) and the next takes the probabilities there.

The E-step task reads a unit's blocks from Parquet itself (the blocks never
pass through the shuffle), places the unit's records in its sorted keys
(``MIN_PROB`` where the table has none, as the broadcast lookup gives), finds
each block's dictionary there once for both directions (what the unit's keys are
and where each block's keys sit among them come from the unit's stored index after
the first iteration, ``engine.unit_index``) and adds the counts
into accumulators aligned with the unit's entries (as the broadcast path adds
into the whole table's); they leave as one sorted run per unit, which the task
merges into one sum per key before emitting them by reducer bucket. Memory per
task: one unit's entries and accumulators (about 65 bytes per unit key) and
blocks, the records waiting for its later units (Spark's sort spills them to
disk beyond ``spark.python.worker.memory``), and the task's folded counts, which
it sends on whenever they may hold ``TASK_KEYS`` distinct keys
(``spark.spark_align.joinTaskKeys``). A lookup task holds one bucket of the
table and reads its routes a batch at a time. Nothing table-sized anywhere, the
driver included.
The price is two shuffles every iteration (8 bytes per unit key and direction
to the E-step, then the counts), which the broadcast path avoids: it ships the
whole table instead.

The rule (``--shipping auto``): broadcast while the whole table fits the
budget, ``entries x 48 bytes <= --table-budget-mb``, else join. The default
budget (768 MB, 16.7M entries) is well under the memory a Python worker can use beside its
block work on a typical executor; raise it where executors are big, lower it
where many Python workers share one executor's memory.
"""
from __future__ import annotations

import posixpath
import struct
import time
import zlib

import numpy as np
import pyarrow as pa

from spark_align.config import SHIPPINGS as SHIPPING_MODES
from spark_align.engine.estep import _maybe_fail, note_task_memory
from spark_align.engine.ingest import block_array
from spark_align.engine.tables import DIRS, MIN_PROB, DirectionTable, direction_span, keep_freed_memory
from spark_align.kernels import counts, ragged

BYTES_PER_ENTRY = 48  # per Python worker per entry on the whole-table path (see the module docstring)
DEFAULT_BUDGET_MB = 768
# A join-path E-step task sends its folded counts on whenever they may hold this many distinct keys (24
# bytes each, 48 while they are merged, plus their encoding), so that its memory does not grow with its
# share of the corpus.
TASK_KEYS = 8_000_000
TASK_KEYS_CONF = "spark.spark_align.joinTaskKeys"


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


UNIT_INDEX = ("encoded", "unit_index")  # the join E-step's stored unit indexes (engine.unit_index)
ROUTES = ("encoded", "routes")  # encoded/routes/<buckets>/part-PPPPP.parquet
# Routes files: keys delta-coded (ascending within each unit); directions and units dictionary-coded
# (their long runs become run lengths).
ROUTES_WRITE = {"compression": "lz4_raw", "use_dictionary": ["dir", "unit"],
                "column_encoding": {"key": "DELTA_BINARY_PACKED"}}
ROUTES_SCHEMA = pa.schema([("dir", pa.int8()), ("unit", pa.int32()), ("key", pa.int64())])
ROUTE_BATCH_ROWS = 1 << 20  # routes rows written at a time (a row group), and read at a time by a lookup task


def routes_commit(n_buckets: int) -> str:
    """The commit of the routes for ``n_buckets`` table buckets: the units they number, written last."""
    return f"encoded/routes/{n_buckets}.json"


def task_of(unit: int, n_tasks: int, n_units: int) -> int:
    """The E-step task of a unit: consecutive units to each task, as ``parallelize`` slices a list."""
    return unit * n_tasks // n_units


def key_buckets(keys: np.ndarray, d: int, n_buckets: int) -> np.ndarray:
    """The table bucket (reducer) of each pair key ``src << 32 | tgt`` in direction ``d``
    (``kernels.counts.bucket_of_cond`` of its conditioning word: src forward, tgt reverse)."""
    cond = keys >> 32 if d == 0 else keys & np.int64(0xFFFFFFFF)
    bucket = counts.bucket_of_cond(cond, d, n_buckets)
    # 16 bits, where they hold the buckets, make a stable argsort a counting sort: 4x faster
    return bucket.astype(np.int16) if n_buckets <= 2 ** 15 else bucket


def bucket_order(keys: np.ndarray, d: int, n_buckets: int) -> tuple[np.ndarray, np.ndarray]:
    """(order, bounds): ``keys[order[bounds[p]:bounds[p + 1]]]`` are the keys of bucket ``p`` in
    direction ``d`` (:func:`key_buckets`), in their order in ``keys``."""
    bucket = key_buckets(keys, d, n_buckets)
    order = np.argsort(bucket, kind="stable")
    return order, np.concatenate([[0], np.cumsum(np.bincount(bucket, minlength=n_buckets))])


def distinct_keys(dictionaries: list[np.ndarray]) -> np.ndarray:
    """The distinct keys of a unit's block dictionaries, ascending: the keys its entries are found in."""
    return ragged.distinct(np.concatenate(dictionaries)) if dictionaries else np.zeros(0, np.int64)


def unit_dictionary(fs, path: str, row_group: int) -> np.ndarray:
    """:func:`distinct_keys` of one unit's blocks, read from Parquet (only ``dict_keys``)."""
    from spark_align.engine.mstep import read_unit

    return distinct_keys([block_array(b.column(0), k, "dict_keys")
                          for b in read_unit(fs, path, row_group, columns=["dict_keys"]) for k in range(b.num_rows)])


def ensure_routes(spark, store, units: list[tuple[str, int]], n_buckets: int) -> str:
    """The fsspec URL of the routes for ``n_buckets`` table buckets, written first if need be.

    File ``part-PPPPP.parquet`` holds, per direction, every unit key whose entry that direction keeps
    in bucket ``P``, as rows (dir, unit, key) sorted by (dir, unit, key). Written once per run and
    number of buckets, by one Spark job (the unit keys shuffled by bucket and sorted, so that a writer
    holds :data:`ROUTE_BATCH_ROWS` rows at a time), and committed by
    ``routes_commit(n_buckets)`` naming the units they number (other units: written again)."""
    from spark_align.engine.mstep import part_name
    from spark_align.store import fsspec_url

    url = fsspec_url(store.spark_path(*ROUTES, str(n_buckets)))
    listed = [[posixpath.basename(path), rg] for path, rg in units]
    committed = store.read_json(routes_commit(n_buckets))
    if committed is not None and committed.get("units") == listed:
        return url
    store.remove(*ROUTES, str(n_buckets))
    sc = spark.sparkContext
    blocks_url = fsspec_url(store.spark_path("encoded", "blocks"))

    def pieces(numbered):
        import fsspec

        fs, _root = fsspec.core.url_to_fs(blocks_url)
        for unit, (path, row_group) in numbered:
            for p, (d, u, data) in unit_routes(unit, unit_dictionary(fs, path, row_group), n_buckets):
                yield (p, d, u), data

    def write(p, records):
        import fsspec

        fs, root = fsspec.core.url_to_fs(url)
        target = posixpath.join(root, part_name(p))
        tmp = f"{target}.tmp-{time.time_ns()}"
        fs.makedirs(root, exist_ok=True)
        with fs.open(tmp, "wb") as fh:
            write_routes(fh, ((d, u, data) for (_p, d, u), data in records))
        fs.mv(tmp, target)
        yield p

    numbered = list(enumerate(units))
    written = (sc.parallelize(numbered, max(1, min(len(numbered), 4 * sc.defaultParallelism))).mapPartitions(pieces)
               .repartitionAndSortWithinPartitions(n_buckets, lambda key: key[0])
               .mapPartitionsWithIndex(write).collect())
    if sorted(written) != list(range(n_buckets)):
        raise RuntimeError(f"routes: {n_buckets - len(set(written))} of {n_buckets} bucket files were not written")
    store.write_json(routes_commit(n_buckets), {"units": listed, "buckets": n_buckets})
    return url


def unit_routes(unit: int, keys: np.ndarray, n_buckets: int):
    """(bucket, (direction index, unit, keys as bytes)) pieces of the routes: for each direction, the
    unit's ascending ``keys`` whose entry that direction keeps in each bucket."""
    for d in range(len(DIRS)):
        order, bounds = bucket_order(keys, d, n_buckets)  # keys ascending within each bucket
        for p in np.flatnonzero(np.diff(bounds)):
            yield int(p), (d, unit, keys[order[bounds[p]:bounds[p + 1]]].tobytes())


def write_routes(fh, pieces) -> None:
    """One bucket's routes file, written to ``fh`` from its pieces (direction index, unit, keys as bytes)
    sorted by (direction, unit), :data:`ROUTE_BATCH_ROWS` rows at a time (a row group each)."""
    import pyarrow.parquet as pq

    with pq.ParquetWriter(fh, ROUTES_SCHEMA, **ROUTES_WRITE) as writer:
        chunk, rows = [], 0
        for piece in pieces:
            chunk.append(piece)
            rows += len(piece[2]) // 8
            if rows >= ROUTE_BATCH_ROWS:
                writer.write_table(routes_table(chunk))
                chunk, rows = [], 0
        if chunk:
            writer.write_table(routes_table(chunk))


def routes_table(pieces) -> pa.Table:
    """One bucket's routes file, (dir, unit, key) sorted by (dir, unit, key), from its pieces."""
    parts = sorted(pieces)
    keys = [np.frombuffer(data, np.int64) for _d, _u, data in parts]
    lengths = [len(k) for k in keys]
    return pa.Table.from_arrays([
        pa.array(np.repeat([d for d, _u, _k in parts], lengths).astype(np.int8)),
        pa.array(np.repeat([u for _d, u, _k in parts], lengths).astype(np.int32)),
        pa.array(np.concatenate(keys) if keys else np.zeros(0, np.int64))], schema=ROUTES_SCHEMA)


def bucket_entries(part) -> dict[int, tuple[np.ndarray, np.ndarray]]:
    """Direction index -> (keys ascending, probabilities) of table rows (dir, src, tgt, prob) as Arrow."""
    dirs, src, tgt, prob = (np.asarray(part.column(name).to_numpy()) for name in ("dir", "src", "tgt", "prob"))
    out = {}
    for d in range(len(DIRS)):
        sel = dirs == d
        keys, probs = ragged.make_key(src[sel], tgt[sel]), prob[sel]
        if len(keys) > 1 and not np.all(keys[1:] > keys[:-1]):
            order = np.argsort(keys, kind="stable")
            keys, probs = keys[order], probs[order]
        out[d] = (keys, probs)
    return out


_RECORD_HEAD = 3  # int64s before a record's probabilities: its bucket, its direction, their number


ROUTE_POSITIONS = "positions"  # encoded/routes/<buckets>/positions/part-PPPPP.bin (RoutePositions)


class RoutePositions:
    """Where each key of one bucket's routes sat in that bucket's table file, streamed in routes order.

    The file: a head (magic, the table file's key digest (``engine.tables.KEYS_META``, 32 hex
    characters), a bit per direction index it covers), then one int32 per routes row of those
    directions in the routes' order: the row's position among the table file's rows of its direction,
    -1 where the key is not there; then the number of rows and a CRC-32 of all before it. Written and
    read a routes batch at a time, so neither side holds more than a batch of it."""

    MAGIC = b"SAROUTP2"
    HEAD = struct.Struct("<8s32sq")  # magic, digest, direction bits
    TAIL = struct.Struct("<qI")  # rows, CRC-32

    @staticmethod
    def covers(directions: list[int]) -> int:
        return sum(1 << d for d in directions)

    @classmethod
    def open_checked(cls, fs, path: str, digest: bytes, directions: list[int]):
        """(an open file, its number of positions) for ``digest`` and ``directions``, the file whole and
        undamaged (its CRC-32 checked in one streamed pass) and positioned at its first position; None
        otherwise."""
        try:
            fh = fs.open(path, "rb")
        except OSError:
            return None
        try:
            size = fs.size(path)
            head = fh.read(cls.HEAD.size)
            if len(head) != cls.HEAD.size or size < cls.HEAD.size + cls.TAIL.size:
                raise ValueError("too short")
            magic, got_digest, bits = cls.HEAD.unpack(head)
            body = size - cls.HEAD.size - cls.TAIL.size
            if magic != cls.MAGIC or got_digest != digest or bits != cls.covers(directions) or body % 4:
                raise ValueError("not positions for this table and these directions")
            crc, left = zlib.crc32(head), body
            while left:
                piece = fh.read(min(left, 1 << 24))
                if not piece:
                    raise ValueError("truncated")
                crc, left = zlib.crc32(piece, crc), left - len(piece)
            tail = fh.read(cls.TAIL.size)
            rows, stored_crc = cls.TAIL.unpack(tail) if len(tail) == cls.TAIL.size else (-1, 0)
            if rows != body // 4 or zlib.crc32(tail[:8], crc) != stored_crc:
                raise ValueError("damaged")
            fh.seek(cls.HEAD.size)
            return fh, rows
        except (OSError, ValueError):
            fh.close()
            return None

    @classmethod
    def writer(cls, fs, path: str, digest: bytes, directions: list[int]):
        """A :class:`~spark_align.store.CacheWriter` for ``path``, its head written: then :meth:`put` the
        positions in routes order and :meth:`finish` it."""
        from spark_align.store import CacheWriter

        out = CacheWriter(fs, path)
        out.write(cls.HEAD.pack(cls.MAGIC, digest, cls.covers(directions)))
        return out

    @staticmethod
    def put(out, pos: np.ndarray, hit: np.ndarray) -> None:
        out.write(np.where(hit, pos, -1).astype("<i4").tobytes())

    @classmethod
    def finish(cls, out) -> None:
        """The tail (rows, CRC-32 of all before it) written, and the file moved into place."""
        out.write(struct.pack("<q", (out.size - cls.HEAD.size) // 4))
        out.write(struct.pack("<I", out.crc))
        out.commit()

    @classmethod
    def take(cls, fh, n: int) -> np.ndarray:
        """The next ``n`` positions of a file from :meth:`open_checked`."""
        data = fh.read(4 * n)
        if len(data) != 4 * n:
            raise RuntimeError("route positions are fewer than the routes")
        return np.frombuffer(data, "<i4")


def make_route_lookup(routes_url: str, directions: tuple[str, ...]):
    """The lookup of bucket ``p``: (p, its table entries) -> (unit, record) for every unit and direction
    with keys there. A record is int64 [p, direction index, n] then n float64 probabilities: the table's
    entry for each of the unit's keys of bucket ``p`` in that direction (ascending), ``MIN_PROB`` where
    it has none. The routes file is read :data:`ROUTE_BATCH_ROWS` rows at a time (a (direction, unit) run
    cut by a batch is kept for the next), so a lookup task holds one bucket of the table, not of the
    routes, which grow with the corpus.

    The entries are given as ``entries`` (direction index -> (keys ascending, probabilities)) or read
    through ``table(columns)`` (the bucket's table file as Arrow, rows sorted by (dir, src, tgt), as
    the reducers write them). With ``table`` and ``digest`` (the file's key digest), where each routes
    key sat in the file is kept (:class:`RoutePositions`, ``positions/part-PPPPP.bin`` beside the
    routes), and a later lookup over a file with the same keys reads only its ``dir`` and ``prob``
    columns and the routes without their keys, and takes the probabilities at those positions. Like
    the unit indexes (``engine.unit_index``) the file is a cache: missing, damaged, or for other keys,
    the keys are searched for again and the file written again (under a temporary name, moved into
    place when whole)."""

    def looked_up(p: int, entries: dict[int, tuple[np.ndarray, np.ndarray]] | None = None, *, table=None,
                  digest: bytes | None = None):
        import fsspec
        import pyarrow.parquet as pq

        from spark_align.engine.mstep import part_name
        from spark_align.kernels import lookup

        wanted = [DIRS.index(x) for x in directions]
        fs, root = fsspec.core.url_to_fs(routes_url)
        positions_path = posixpath.join(root, ROUTE_POSITIONS, f"{part_name(p)[:-len('.parquet')]}.bin")
        cacheable = entries is None and digest is not None and len(digest) == 32
        stored = RoutePositions.open_checked(fs, positions_path, digest, wanted) if cacheable else None
        keeping = None  # a RoutePositions.writer for what the searches find
        taken = 0  # positions taken from the stored file
        if stored is not None:
            part = table(["dir", "prob"])
            dir_col, prob = (np.asarray(part.column(name).to_numpy()) for name in ("dir", "prob"))
            values = {d: prob[slice(*direction_span(dir_col, d))] for d in wanted}
        else:
            if entries is None:
                entries = bucket_entries(table(["dir", "src", "tgt", "prob"]))
            # positions are kept as int32: not for a bucket file of 2^31 rows or more in a direction
            if cacheable and all(len(keys) < 2 ** 31 for keys, _probs in entries.values()):
                keeping = RoutePositions.writer(fs, positions_path, digest, wanted)

        def records(rows: list[np.ndarray]):
            nonlocal taken
            dirs, unit = rows[0], rows[1]
            for d in wanted:
                lo, hi = direction_span(dirs, d)  # sorted by direction first
                if lo == hi:
                    continue
                if stored is not None:
                    pos = RoutePositions.take(stored[0], int(hi - lo))
                    taken += hi - lo
                    hit = pos >= 0
                    if np.any(pos >= len(values[d])):
                        raise RuntimeError(f"route positions of bucket {p} lie beyond its table file")
                    probs = np.full(hi - lo, MIN_PROB)
                    probs[hit] = values[d][pos[hit]]
                else:
                    table_keys, table_probs = entries.get(d, (np.zeros(0, np.int64), np.zeros(0)))
                    # keys ascend within each unit: the search gallops forward and restarts at each unit
                    pos, hit, probs = lookup.find(table_keys, table_probs, rows[2][lo:hi], MIN_PROB)
                    if keeping is not None:
                        RoutePositions.put(keeping, pos, hit)
                units_d = unit[lo:hi]
                cuts = np.flatnonzero(np.diff(units_d)) + 1
                for u, segment in zip(units_d[np.concatenate([[0], cuts])].tolist(), np.split(probs, cuts)):
                    yield u, np.array([p, d, len(segment)], np.int64).tobytes() + segment.tobytes()

        carry = None
        columns = ["dir", "unit"] if stored is not None else ["dir", "unit", "key"]
        try:
            with fs.open(posixpath.join(root, part_name(p)), "rb") as fh:
                for batch in pq.ParquetFile(fh).iter_batches(batch_size=ROUTE_BATCH_ROWS, columns=columns):
                    rows = [batch.column(i).to_numpy() for i in range(len(columns))]
                    if carry is not None:
                        rows = [np.concatenate([a, b]) for a, b in zip(carry, rows)]
                    starts = np.flatnonzero((rows[0][1:] != rows[0][:-1]) | (rows[1][1:] != rows[1][:-1])) + 1
                    last = int(starts[-1]) if len(starts) else 0  # the last run may go on in the next batch
                    carry = [a[last:] for a in rows]
                    if last:
                        yield from records([a[:last] for a in rows])
            if carry is not None and len(carry[0]):
                yield from records(carry)
            if stored is not None and taken != stored[1]:
                raise RuntimeError(f"route positions of bucket {p} are more than its routes")
            if keeping is not None:
                RoutePositions.finish(keeping)
                keeping = None
        finally:
            if stored is not None:
                stored[0].close()
            if keeping is not None:  # not whole: dropped
                keeping.discard()
        note_task_memory("lookup")

    return looked_up


def unit_entries(keys: np.ndarray, records: list[bytes], directions: tuple[str, ...], n_buckets: int,
                 unit: int, orders: dict[str, tuple[np.ndarray, np.ndarray]] | None = None
                 ) -> dict[str, DirectionTable]:
    """A unit's entries from its routed records (:func:`make_route_lookup`): one
    :class:`~spark_align.engine.tables.DirectionTable` per direction over the unit's sorted ``keys``
    (``orders``: direction -> :func:`bucket_order` of ``keys``, if already known).
    RuntimeError if a bucket's entries are missing, repeated or of the wrong length."""
    got: dict[tuple[int, int], bytes] = {}
    for data in records:
        p, d, _n = (int(x) for x in np.frombuffer(data, np.int64, _RECORD_HEAD))
        if (p, d) in got:
            raise RuntimeError(f"unit {unit}: the {DIRS[d]} entries of table bucket {p} arrived twice")
        got[p, d] = data
    out = {}
    for direction in directions:
        d = DIRS.index(direction)
        order, bounds = orders[direction] if orders is not None else bucket_order(keys, d, n_buckets)
        probs = np.empty(len(keys), np.float64)
        missing = []
        for p in np.flatnonzero(np.diff(bounds)).tolist():
            data = got.get((p, d))
            if data is None:
                missing.append(p)
                continue
            segment = np.frombuffer(data, np.float64, offset=8 * _RECORD_HEAD)
            if len(segment) != bounds[p + 1] - bounds[p]:
                raise RuntimeError(f"unit {unit}: {len(segment)} {direction} entries of table bucket {p} "
                                   f"for {bounds[p + 1] - bounds[p]} keys")
            probs[order[bounds[p]:bounds[p + 1]]] = segment
        if missing:
            raise RuntimeError(f"unit {unit}: no {direction} entries arrived from table buckets {missing[:5]}")
        out[direction] = DirectionTable(keys, probs)
    return out


def units_with_records(task_index: int, routed, n_tasks: int, n_units: int):
    """(unit, its records) for every unit of task ``task_index`` (:func:`task_of`) in order, from the
    task's routed (unit, record) pairs sorted by unit; RuntimeError for a record of another unit."""
    routed = iter(routed)
    ahead = next(routed, None)
    for unit in (u for u in range(n_units) if task_of(u, n_tasks, n_units) == task_index):
        records = []
        while ahead is not None and ahead[0] == unit:
            records.append(ahead[1])
            ahead = next(routed, None)
        yield unit, records
    if ahead is not None:
        raise RuntimeError(f"task {task_index}: entries arrived for unit {ahead[0]}, not one of its own")


def make_join_estep(model, directions: tuple[str, ...], dense: dict[str, dict], *, blocks_url: str,
                    units: list[tuple[str, int]], n_tasks: int, n_buckets: int, flush_keys: int = TASK_KEYS,
                    index_url: str | None = None):
    """The E-step of the join path: (task index, its (unit, record) pairs sorted by unit) -> (bucket,
    payload) records of its units' counts, folded (``engine.mstep``) and sent on whenever they may hold
    ``flush_keys`` distinct keys and at the end, and the timing scalars of ``engine.estep``'s module
    docstring (3, 4, 5, 7 and 8).

    Every unit of the task (:func:`task_of`) is run, in order, with the records that arrived for it. A
    unit's counts are added into accumulators aligned with its entries (found once per block for both
    directions, as the broadcast path adds into the whole table's) and leave them as sorted runs,
    which the task's :class:`~spark_align.kernels.counts.CountBuffer` merges. What a unit's keys are,
    where each block's keys sit among them and their order by bucket are read from the unit's stored
    index under ``index_url`` (``engine.unit_index``; None: none), with the blocks read without their
    dictionary keys; without a usable one they are worked out from the blocks and stored."""

    def estep(task_index, routed):
        import fsspec

        from spark_align.engine import mstep, unit_index
        from spark_align.engine.estep import block_results, emitted_keys, read_blocks, timing_payloads

        _maybe_fail()
        keep_freed_memory()
        started = time.perf_counter()
        fs, _root = fsspec.core.url_to_fs(blocks_url)
        index_fs, index_root = fsspec.core.url_to_fs(index_url) if index_url else (None, None)
        folded = counts.CountBuffer()  # the counts not sent yet
        seconds = {"lookup": 0.0, "add": 0.0, "read": 0.0, "payload": 0.0}

        def fold(task: mstep.TaskCounts) -> None:
            added = time.perf_counter()
            for run in task.rows():
                folded.add(*run)
            seconds["add"] += time.perf_counter() - added

        def flush():
            nonlocal folded
            payload_started = time.perf_counter()
            records = list(mstep.payloads(folded, n_buckets))
            folded = counts.CountBuffer()
            seconds["payload"] += time.perf_counter() - payload_started
            return records

        def unit_blocks(unit: int):
            # (blocks, index): with a stored index that fits them, the blocks without their dictionary keys
            path, row_group = units[unit]
            read_started = time.perf_counter()
            index = unit_index.read(index_fs, index_root, path, row_group) if index_fs is not None else None
            blocks = read_blocks(fs, path, row_group, with_keys=index is None)
            if index is not None and not index.fits([block.n_dict for block in blocks]):
                index, blocks = None, read_blocks(fs, path, row_group, with_keys=True)
            seconds["read"] += time.perf_counter() - read_started
            if index is None:
                looked_up = time.perf_counter()
                index = unit_index.build([block.dict_keys for block in blocks], n_buckets)
                if index_fs is not None:
                    unit_index.write(index_fs, index_root, path, row_group, index)
                seconds["lookup"] += time.perf_counter() - looked_up
            return blocks, index

        def run_unit(unit: int, records: list[bytes]):
            blocks, index = unit_blocks(unit)
            looked_up = time.perf_counter()
            entries = unit_entries(index.keys, records, directions, n_buckets, unit,
                                   orders={d: index.order(DIRS.index(d), n_buckets) for d in directions})
            lexical = {d: emitted_keys(index.keys, d) for d in directions}
            seconds["lookup"] += time.perf_counter() - looked_up
            task, pending, offset = mstep.TaskCounts(entries), 0, 0
            for block in blocks:
                looked_up = time.perf_counter()
                pos = index.positions[offset:offset + block.n_dict]
                offset += block.n_dict
                found = (pos, np.ones(len(pos), bool))  # every dictionary key is one of the unit's
                t_locals = {d: entries[d].probs[pos] for d in directions}
                emitted = {d: lexical[d][pos] for d in directions}
                seconds["lookup"] += time.perf_counter() - looked_up
                for result in block_results(model, directions, block, t_locals, dense, emitted):
                    added = time.perf_counter()
                    task.add(block.dict_keys, found, *result)
                    seconds["add"] += time.perf_counter() - added
                pending += block.n_dict * len(directions)
                if folded.max_keys + pending >= flush_keys:
                    fold(task)
                    pending = 0
                    yield from flush()
            fold(task)

        for unit, records in units_with_records(task_index, routed, n_tasks, len(units)):
            yield from run_unit(unit, records)
        records = flush()
        note_task_memory("join")
        values = [time.perf_counter() - started, seconds["lookup"], seconds["add"], 0.0, seconds["read"],
                  seconds["payload"]]
        yield from records
        yield from timing_payloads(directions, values, n_buckets)

    return estep


def routed_entries(spark, store, units: list[tuple[str, int]], table_path: str, directions: tuple[str, ...], *,
                   n_tasks: int, n_buckets: int, seconds=None):
    """Every unit's entries of the table at ``table_path`` as an RDD of (unit, record) pairs
    (:func:`make_route_lookup`), in ``n_tasks`` partitions (:func:`task_of`) sorted by unit: one lookup
    task per table bucket routes them.

    A table the reducers wrote in ``n_buckets`` buckets is read file by file, one per lookup task;
    any other (the seeded random initial table, or one written with another number of reducers) is
    first sent to the lookup tasks by bucket, through a shuffle. ``seconds``: a Spark accumulator that
    the lookup tasks add the seconds of their own work to (reading their table bucket and routes,
    finding the entries; not handing the records to Spark), for the iteration's metrics (a retried
    task adds its seconds again)."""
    from spark_align.engine.tables import KEYS_META, TableLayout
    from spark_align.store import fsspec_url

    sc = spark.sparkContext
    routes_url = ensure_routes(spark, store, units, n_buckets)
    table_url = fsspec_url(table_path)
    layout = TableLayout.read(table_url)
    lookup_bucket = make_route_lookup(routes_url, directions)

    def read_part(name: str, columns=("dir", "src", "tgt", "prob")):
        import fsspec
        import pyarrow.parquet as pq

        fs, root = fsspec.core.url_to_fs(table_url)
        with fs.open(posixpath.join(root, name), "rb") as fh:
            return pq.read_table(fh, columns=list(columns))

    def timed(make):
        # the seconds spent making the records (inside next()), not those the consumer spends on them
        items, spent = make(), 0.0
        while True:
            started = time.perf_counter()
            item = next(items, None)
            spent += time.perf_counter() - started
            if item is None:
                break
            yield item
        if seconds is not None:
            seconds.add(spent)

    if layout.bucketed and len(layout.names) == n_buckets:
        names, digests = layout.names, [m.get(KEYS_META) for m in layout.metas]
        looked = sc.parallelize(range(n_buckets), n_buckets).flatMap(
            lambda p: timed(lambda: lookup_bucket(p, table=lambda columns: read_part(names[p], columns),
                                                  digest=digests[p])))
    else:
        def by_bucket(name: str):
            part = read_part(name)
            dirs, src, tgt = (np.asarray(part.column(c).to_numpy()) for c in ("dir", "src", "tgt"))
            bucket = counts.bucket_of_cond(np.where(dirs == 0, src, tgt), dirs, n_buckets)
            for p in np.unique(bucket):
                yield int(p), part.filter(pa.array(bucket == p))

        def merged(p, pieces):
            pieces = [piece for _p, piece in pieces]
            if pieces:
                yield from timed(lambda: lookup_bucket(p, bucket_entries(pa.concat_tables(pieces))))

        looked = (sc.parallelize(layout.names, max(1, min(len(layout.names), 4 * sc.defaultParallelism)))
                  .flatMap(by_bucket).partitionBy(n_buckets, lambda p: p).mapPartitionsWithIndex(merged))
    n_units = len(units)
    return looked.repartitionAndSortWithinPartitions(n_tasks, lambda u: task_of(u, n_tasks, n_units))


def join_payloads(spark, store, units: list[tuple[str, int]], table_path: str, model, directions: tuple[str, ...],
                  dense: dict[str, dict], *, n_tasks: int, n_buckets: int, flush_keys: int = TASK_KEYS,
                  lookup_seconds=None):
    """The (bucket, payload) records of one iteration with per-unit parameter shipping, as an RDD (what
    ``engine.mstep.reduce_and_write`` takes): :func:`routed_entries` to the E-step tasks
    (``lookup_seconds``: its ``seconds``)."""
    from spark_align.store import fsspec_url

    estep = make_join_estep(model, directions, dense, blocks_url=fsspec_url(store.spark_path("encoded", "blocks")),
                            units=units, n_tasks=n_tasks, n_buckets=n_buckets, flush_keys=flush_keys,
                            index_url=fsspec_url(store.spark_path(*UNIT_INDEX)))
    return routed_entries(spark, store, units, table_path, directions, n_tasks=n_tasks, n_buckets=n_buckets,
                          seconds=lookup_seconds).mapPartitionsWithIndex(estep)


DECODED = "decoded"  # the routed output pass's decoded rows, removed once the output is written


def decode_routed(spark, store, table_path: str, decoder, *, n_buckets: int,
                  extra: dict[str, tuple[np.ndarray, float]] | None = None):
    """The output pass's decoded rows (``engine.output.PACKED_SCHEMA``) with per-unit shipping: each
    decoding task gets its units' entries through :func:`routed_entries` (no Python worker reads the
    whole table) and writes its units' rows under ``RUN_DIR/decoded/`` (one Parquet file per unit),
    which are returned as a DataFrame for the output pass to join to the corpus. ``extra``: direction
    -> (keys, probability) of entries the table lacks, set in every unit that has those keys (the
    unknown words' entries of ``engine.align``)."""
    from spark_align.engine.mstep import block_units
    from spark_align.engine.output import UNITS_PER_CORE
    from spark_align.store import fsspec_url

    units = block_units(store)
    n_tasks = max(1, min(len(units), UNITS_PER_CORE * spark.sparkContext.defaultParallelism))
    blocks_url = fsspec_url(store.spark_path("encoded", "blocks"))
    out_url = fsspec_url(store.spark_path(DECODED))
    directions = decoder.directions
    store.remove(DECODED)

    def decode(task_index, routed):
        import dataclasses

        import fsspec
        import pyarrow.parquet as pq

        from spark_align.engine.ingest import blocks_from_batch
        from spark_align.engine.mstep import read_unit
        from spark_align.engine.tables import Held
        from spark_align.kernels import lookup

        keep_freed_memory()
        fs, _root = fsspec.core.url_to_fs(blocks_url)
        out_fs, out_root = fsspec.core.url_to_fs(out_url)
        out_fs.makedirs(out_root, exist_ok=True)
        for unit, records in units_with_records(task_index, routed, n_tasks, len(units)):
            batches = list(read_unit(fs, *units[unit]))
            keys = distinct_keys([block.dict_keys for batch in batches
                                  for _id, _rows, block in blocks_from_batch(batch)])
            entries = unit_entries(keys, records, directions, n_buckets, unit)
            for direction, (extra_keys, prob) in (extra or {}).items():
                if direction in entries:
                    position, found = lookup.positions(keys, extra_keys)
                    entries[direction].probs[position[found]] = prob
            unit_decoder = dataclasses.replace(decoder, tables_bc=Held(entries))
            rows = list(unit_decoder(batches, packed=True))
            if rows:
                target = posixpath.join(out_root, f"part-{unit:06d}.parquet")
                tmp = f"{target}.tmp-{time.time_ns()}"  # a retried task's attempt replaces the file whole
                with out_fs.open(tmp, "wb") as fh:
                    pq.write_table(pa.Table.from_batches(rows), fh, compression="lz4_raw")
                out_fs.mv(tmp, target)
            yield unit

    decoded = routed_entries(spark, store, units, table_path, directions, n_tasks=n_tasks,
                             n_buckets=n_buckets).mapPartitionsWithIndex(decode).collect()
    if sorted(decoded) != list(range(len(units))):
        raise RuntimeError(f"decoding: {len(units) - len(set(decoded))} of {len(units)} units were not written")
    return spark.read.parquet(store.spark_path(DECODED))
