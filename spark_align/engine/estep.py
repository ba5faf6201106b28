"""The E-step tasks, and the rows they produce.

On the whole-table path (:func:`make_estep`) each task reads its row groups of
encoded blocks, looks its blocks' dictionaries up in the table every Python
worker holds (``engine.tables``), runs the model's pure kernel per direction
(:func:`block_results`) and folds everything into one sum per row
(``engine.mstep.TaskCounts``); the join path (``engine.shipping``) does the same
with the entries its units need, received through the join. Rows are
``(dir, src, tgt, hi, lo)``:

* ``src >= 0``: expected count of the pair (src, tgt) in direction ``dir``;
* ``src == -1``: entry ``tgt`` of the model's dense statistics vector;
* ``src == -2``: scalars (``tgt == 0``: log-likelihood; ``tgt == 1``: seconds spent in the
  model kernel, for the share-outside-the-kernel figure; ``tgt == 2``: links processed;
  per task: ``tgt == 3`` task seconds (times its threads: core seconds), of which ``tgt == 4``
  finding the blocks' entries in the table (the lookup), ``5`` adding counts into the task's
  accumulators (``4``, ``5`` and ``7`` summed over threads), ``6`` loading the table
  (first task of a Python worker per iteration), ``7`` reading blocks and ``8`` preparing the
  task's output records (``6`` and ``8``, which come before and after the threads share out the
  units, times the threads, like ``3``; the join path's tasks leave 6 at zero); whole-table path only, per
  direction: ``9`` dictionary keys the lookup had to search for (no usable stored hint,
  ``engine.hints``), ``10`` keys it looked up and ``11`` keys whose stored positions it took as they
  are).

Counts leave the task as 64-bit fixed point in two parts (``v = hi / 2^20 +
lo / 2^50``, error below 1e-15 per value) and are summed as integers.
Integer sums do not depend on the order in which Spark's shuffle
delivers partial sums, so a run is bit-for-bit repeatable and does not depend
on the number of partitions. Limits: |per-block value| < 2^43 and fewer than
2^33 summands per key.
"""
from __future__ import annotations

import os
import time

import numpy as np

from spark_align.engine import faults
from spark_align.engine.ingest import blocks_from_batch
from spark_align.engine.tables import DIRS, MIN_PROB, keep_freed_memory

HI_SCALE = 2.0 ** 20
LO_SCALE = 2.0 ** 30
DENSE, SCALAR = -1, -2

# Test-only fault injection: when set (to a directory), the first attempt of every
# E-step task whose partition index is even raises once. Documented in DEVELOPERS.md.
FAIL_ONCE_ENV = "SPARK_ALIGN_TEST_FAIL_ESTEP_ONCE"


def to_fixed(values: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Split float64 values into (hi, lo) int64 so that v ~= hi / 2^20 + lo / 2^50."""
    scaled = np.asarray(values, dtype=np.float64) * HI_SCALE
    hi = np.floor(scaled)
    lo = np.rint((scaled - hi) * LO_SCALE)
    return hi.astype(np.int64), lo.astype(np.int64)


def _maybe_fail() -> None:
    """Test-only faults at the start of every E-step task (both shipping paths call it)."""
    faults.kill_in_task()
    marker_dir = os.environ.get(FAIL_ONCE_ENV)
    if not marker_dir:
        return
    from pyspark import TaskContext

    ctx = TaskContext.get()
    if ctx is None or ctx.partitionId() % 2 or ctx.attemptNumber() > 0:
        return
    marker = os.path.join(marker_dir, f"stage{ctx.stageId()}-part{ctx.partitionId()}")
    if not os.path.exists(marker):
        open(marker, "w").close()
        raise RuntimeError(f"injected E-step failure ({FAIL_ONCE_ENV}) for partition {ctx.partitionId()}")


def make_estep(model, directions: tuple[str, ...], tables_src, dense: dict[str, dict], *, blocks_url: str,
               n_buckets: int, hints_url: str | None = None, threads: int = 1, write_table: dict | None = None):
    """The E-step task of the whole-table path: (file, row group) units -> (bucket, payload) records.

    Each task reads its row groups of encoded blocks straight from Parquet (pyarrow through fsspec,
    a few block rows per batch), looks every block's dictionary up in the whole table
    (``tables_src.value``, read once per Python worker), starting from the row group's stored hints
    under ``hints_url`` (``engine.hints``; None: no hints) and storing them again if any failed, and
    folds all its blocks' counts into one sum per distinct (dir, src, tgt) before emitting them (see
    ``engine.mstep``).

    ``threads``: the task's units are shared out among this many threads (each takes the next unit
    when it is done with one), which share the table and fold into accumulators of their own, added
    together before the task's records are made: one set of records per task whatever the threads.
    The kernels, the lookup and the folding release the GIL (numba ``nogil``), as pyarrow's reads do.

    ``write_table``: for an iteration whose E-step is this one task, whose counts are then the totals:
    the keyword arguments of ``engine.mstep.write_task_table`` but the first two. The task then does
    the M-step itself, writing the table's ``n_buckets`` files as the reducers would (the same bytes)
    and yielding their summaries instead of records to shuffle.
    """

    def estep(units):
        import fsspec

        from spark_align.engine import mstep

        _maybe_fail()
        keep_freed_memory()
        started = time.perf_counter()
        units = list(units)
        n_threads = max(1, min(threads, len(units)))
        tables = tables_src.load(n_threads)
        load_seconds = time.perf_counter() - started
        fs, root = fsspec.core.url_to_fs(blocks_url)
        hints_fs, hints_root = fsspec.core.url_to_fs(hints_url) if hints_url else (None, None)
        mapped_root = mapped_blocks_root(fs, root)
        loops = [_UnitLoop(model, directions, tables, dense, fs, hints_fs, hints_root,
                           mstep.TaskCounts(tables, reuse=True, slot=i), mapped_root) for i in range(n_threads)]
        run_shared(loops, units)
        task = loops[0].task
        for other in loops[1:]:
            task.merge(other.task)
        payload_started = time.perf_counter()
        records = [] if write_table is not None else list(task.payloads(n_buckets))
        payload_seconds = time.perf_counter() - payload_started
        note_task_memory("broadcast")
        # Scalars 3-11 in records of their own: the task's wall time (reading, table lookups, kernels,
        # folding, preparing its output) and the parts of it named in the module docstring, the same
        # under every direction, then the direction's lookup counts. With threads, the parts are
        # summed over them (core seconds) and the wall time is the task's times its threads, as are the
        # load's and the output records' (the threads read the table together; the records, one thread).
        values = [(time.perf_counter() - started) * len(loops), sum(lp.lookup_seconds for lp in loops),
                  sum(lp.add_seconds for lp in loops), load_seconds * len(loops),
                  sum(lp.read_seconds for lp in loops), payload_seconds * len(loops)]
        per_direction = {d: [sum(lp.searched[d] for lp in loops), sum(lp.keys[d] for lp in loops),
                             sum(lp.trusted[d] for lp in loops)] for d in directions}
        if write_table is None:
            yield from records
            yield from timing_payloads(directions, values, n_buckets, per_direction)
            return
        add_timing(task, directions, values, per_direction)
        yield from mstep.write_task_table(task, n_buckets, threads=len(loops), **write_table)

    return estep


def run_shared(loops: list, units: list) -> None:
    """Run ``loop.run(unit)`` for every unit, each loop in a thread of its own taking the next unit as
    it finishes one (one loop: in this thread). When a loop raises, the others take no more units, and
    the error is raised once every thread has stopped."""
    if len(loops) == 1:
        for unit in units:
            loops[0].run(unit)
        return
    import threading
    from concurrent.futures import ThreadPoolExecutor

    pending, lock, failed = iter(units), threading.Lock(), threading.Event()

    def work(loop) -> None:
        while not failed.is_set():
            with lock:
                unit = next(pending, None)
            if unit is None:
                return
            try:
                loop.run(unit)
            except BaseException:
                failed.set()
                raise

    with ThreadPoolExecutor(len(loops), thread_name_prefix="estep") as pool:
        for future in [pool.submit(work, loop) for loop in loops]:
            future.result()


class _UnitLoop:
    """One thread's share of a whole-table E-step task: reads units, looks their blocks up, runs the
    kernels and folds the counts into its own ``task`` (``engine.mstep.TaskCounts``), timing each part."""

    def __init__(self, model, directions, tables, dense, fs, hints_fs, hints_root, task,
                 mapped_root: str | None = None) -> None:
        self.model, self.directions, self.tables, self.dense = model, directions, tables, dense
        self.fs, self.hints_fs, self.hints_root, self.task = fs, hints_fs, hints_root, task
        self.mapped_root = mapped_root
        self.hinted = [d for d in directions if hints_fs is not None and tables[d].constant is None]
        self.lookup_seconds = self.add_seconds = self.read_seconds = 0.0
        self.searched = dict.fromkeys(directions, 0)
        self.keys = dict.fromkeys(directions, 0)
        self.trusted = dict.fromkeys(directions, 0)

    def run(self, unit: tuple[str, int]) -> None:
        from spark_align.engine import hints
        from spark_align.kernels import lookup

        path, row_group = unit
        directions, tables, hinted, fs = self.directions, self.tables, self.hinted, self.fs
        looked_up = time.perf_counter()
        stored = {d: hints.read(self.hints_fs, self.hints_root, d, path, row_group) for d in hinted}
        trusted = {d for d in hinted if hints_exact_for(stored[d], tables[d])}
        self.lookup_seconds += time.perf_counter() - looked_up
        read_started = time.perf_counter()
        blocks = read_blocks(fs, path, row_group, with_keys=trusted != set(directions), mapped_root=self.mapped_root)
        self.read_seconds += time.perf_counter() - read_started
        looked_up = time.perf_counter()
        sizes = [block.n_dict for block in blocks]
        n_keys = sum(sizes)
        gathered = {}  # the probabilities of every key of the unit, per direction taking stored positions
        for d in sorted(trusted):
            gathered[d] = lookup.gather_found(tables[d].probs, stored[d].points, stored[d].found, sizes, MIN_PROB)
            if gathered[d] is None:
                trusted.discard(d)  # not what positions of these blocks' keys can be: checked instead
        for d in hinted:
            if d not in trusted and stored[d] is not None and len(stored[d].points) != n_keys:
                stored[d] = None
        self.lookup_seconds += time.perf_counter() - looked_up
        if trusted != set(directions) and blocks and blocks[0].dict_keys is None:
            read_started = time.perf_counter()
            blocks = read_blocks(fs, path, row_group, with_keys=True, mapped_root=self.mapped_root)
            self.read_seconds += time.perf_counter() - read_started
        new_points = {d: [] for d in hinted if d not in trusted}  # hints to store again, if need be
        new_found = {d: [] for d in new_points}
        exact = dict.fromkeys(new_points, True)
        searched = dict.fromkeys(directions, 0)
        offset = 0
        for block, n in zip(blocks, sizes):
            looked_up = time.perf_counter()
            found, t_locals, emitted = {}, {}, {}
            for d in directions:
                h = stored.get(d)
                if d in trusted:
                    points, hit = h.points[offset:offset + n], h.found[offset:offset + n]
                    found[d], emitted[d] = (points, hit), hit
                    t_locals[d] = gathered[d][offset:offset + n]
                    continue
                # Hints found in other keys (a pruned table, or the first table) are mostly stale:
                # the table's hash index finds the keys faster than checking them first.
                usable = h is not None and h.keys_id == tables[d].keys_id
                found[d], t_locals[d], block_points, block_searched = tables[d].find_hinted(
                    block.dict_keys, h.points[offset:offset + n] if usable else None)
                emitted[d] = emitted_keys(block.dict_keys, d)
                searched[d] += block_searched
                if d in new_points:
                    new_points[d].append(block_points)
                    new_found[d].append(found[d][1])
                    exact[d] = exact[d] and bool(np.array_equal(found[d][1], emitted[d]))
            offset += n
            self.lookup_seconds += time.perf_counter() - looked_up
            for result in block_results(self.model, directions, block, t_locals, self.dense, emitted):
                added = time.perf_counter()
                self.task.add(block.dict_keys, found[DIRS[result[0]]], *result)
                self.add_seconds += time.perf_counter() - added
        looked_up = time.perf_counter()
        for d, points in new_points.items():
            # Stored again when a key was searched for or the table's keys are not the ones the
            # hints name (so that the next iteration, with the same keys, can take them as they are).
            if points and (searched[d] or stored[d] is None or stored[d].keys_id != tables[d].keys_id):
                hints.write(self.hints_fs, self.hints_root, d, path, row_group, lookup.StoredHints(
                    np.concatenate(points), np.concatenate(new_found[d]), tables[d].keys_id, exact[d]))
        for d in directions:
            self.searched[d] += searched[d]
            self.keys[d] += n_keys
            self.trusted[d] += n_keys if d in trusted else 0
        self.lookup_seconds += time.perf_counter() - looked_up


def timing_payloads(directions: tuple[str, ...], values: list[float], n_buckets: int,
                    per_direction: dict[str, list[float]] | None = None):
    """(bucket, payload) records of a task's scalars 3, 4, ...: ``values`` under every direction, then
    that direction's ``per_direction`` values (module docstring)."""
    from spark_align.engine import mstep

    timing = mstep.TaskCounts({})
    add_timing(timing, directions, values, per_direction)
    return timing.payloads(n_buckets)


def add_timing(task, directions: tuple[str, ...], values: list[float],
               per_direction: dict[str, list[float]] | None = None) -> None:
    """Add a task's scalars 3, 4, ... to ``task`` (an ``engine.mstep.TaskCounts``): ``values`` under every
    direction, then that direction's ``per_direction`` values (module docstring)."""
    for direction in directions:
        row = np.array(values + (per_direction or {}).get(direction, []), np.float64)
        task.add_rows(DIRS.index(direction), np.full(len(row), SCALAR, np.int32),
                      np.arange(3, 3 + len(row), dtype=np.int32), row)


E_STEP_COLUMNS = ["block_id", "src_len", "src_ids", "tgt_len", "tgt_ids", "dict_keys", "grid"]


MAPPED_COLUMNS = [c for c in E_STEP_COLUMNS if c != "dict_keys"]


def mapped_blocks_root(fs, blocks_root: str) -> str | None:
    """Where the mapped files of ``encoded/blocks`` (at ``blocks_root`` in ``fs``) go: ``encoded/mapped``
    on a local file system, None on any other (``engine.mapped``)."""
    import posixpath

    from fsspec.implementations.local import LocalFileSystem

    if not isinstance(fs, LocalFileSystem):
        return None
    return posixpath.join(posixpath.dirname(blocks_root.rstrip("/")), "mapped")


def read_blocks(fs, path: str, row_group: int, *, with_keys: bool, mapped_root: str | None = None) -> list:
    """The blocks of one row group of ``encoded/blocks``, as the E-step needs them (``with_keys=False``:
    without their dictionary keys, for an E-step that knows where they are in the table).

    ``mapped_root`` (a local directory, ``encoded/mapped``): blocks without their keys come from the row
    group's mapped file (``engine.mapped``), which a read from Parquet writes where it is missing."""
    from spark_align.engine import mapped, mstep

    columns = E_STEP_COLUMNS if with_keys else MAPPED_COLUMNS
    target = None if mapped_root is None else mapped.mapped_path(mapped_root, path, row_group)
    batches = None
    if target is not None and not with_keys:
        batches = mapped.read(target, MAPPED_COLUMNS)
    if batches is None:
        batches = list(mstep.read_unit(fs, path, row_group, columns=columns))
        if target is not None and batches and (not with_keys or not os.path.exists(target)):
            mapped.write(target, [b.select(MAPPED_COLUMNS) for b in batches])
    return [block for batch in batches for _block_id, _rows, block in blocks_from_batch(batch)]


def hints_exact_for(stored, table) -> bool:
    """Whether stored hints can be taken as they are for ``table``: found in the same keys (a known
    keys id) and marking exactly the entries the E-step counts (``engine.hints``)."""
    return (stored is not None and stored.exact and stored.found is not None and bool(table.keys_id)
            and stored.keys_id == table.keys_id)


def emitted_keys(dict_keys: np.ndarray, direction: str) -> np.ndarray:
    """Which dictionary entries are lexical counts of ``direction``: the entries it generates, not the
    NULL target of the forward nor the NULL source of the reverse."""
    if direction == "forward":
        return (dict_keys & np.int64(0xFFFFFFFF)) != 0
    return (dict_keys >> 32) != 0


def block_results(model, directions: tuple[str, ...], block, t_locals: dict[str, np.ndarray],
                  dense: dict[str, dict], emitted: dict[str, np.ndarray] | None = None) -> list[tuple]:
    """E-step of one block given its local probabilities (one float64 per ``dict_keys`` entry per direction).

    Returns one ``(direction index, emitted, counts, (src, tgt, values))`` per direction: ``counts``
    per dictionary entry, of which those where ``emitted`` is true are lexical counts
    (:func:`emitted_keys`, unless given per direction in ``emitted``), and the last tuple the
    dense-statistics and scalar rows (see the module docstring).
    """
    out = []
    for direction in directions:
        view = block.view(direction)
        started = time.perf_counter()
        counts, stats, loglik = model.e_step(view, t_locals[direction], dense[direction])
        kernel_seconds = time.perf_counter() - started
        n_links = float(((view.cond_len + 1) * view.gen_len).sum())
        lexical = emitted_keys(block.dict_keys, direction) if emitted is None else emitted[direction]
        # Dense statistics are mostly zero per block (big alignment tables); zeros sum to nothing.
        stat_index = np.flatnonzero(stats).astype(np.int32)
        other = (np.concatenate([np.full(len(stat_index), DENSE, np.int32), np.full(3, SCALAR, np.int32)]),
                 np.concatenate([stat_index, np.arange(3, dtype=np.int32)]),
                 np.concatenate([stats[stat_index], [loglik, kernel_seconds, n_links]]))
        out.append((DIRS.index(direction), lexical, counts, other))
    return out


# Benchmark-only: when set (to a directory), each E-step task and reducer appends its Python worker's peak
# resident memory there, so benchmarks/bench_scaling.py can report peak memory per executor task.
MEMORY_ENV = "SPARK_ALIGN_BENCH_TASK_MEMORY_DIR"


def note_task_memory(path_kind: str) -> None:
    out_dir = os.environ.get(MEMORY_ENV)
    if not out_dir:
        return
    import resource

    from pyspark import TaskContext

    ctx = TaskContext.get()
    part = ctx.partitionId() if ctx is not None else -1
    peak_kb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    with open(os.path.join(out_dir, f"{path_kind}-{os.getpid()}-{part}-{time.time_ns()}.txt"), "w") as fh:
        fh.write(f"{peak_kb}\n")
