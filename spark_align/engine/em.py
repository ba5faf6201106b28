"""The EM driver loop: E-step job, exact reduction and M-step, checkpoint, progress line.

Per iteration, one Spark job: E-step tasks over the encoded blocks (both
directions at once) fold their counts per task; one shuffle of those folded
counts, keyed by conditioning word, reaches reducer tasks that sum them
exactly, normalise and write the new table (``engine.mstep``); a JSON
manifest is written last (the commit). The driver plans the job and collects
small sums (dense statistics, log-likelihood); it never holds the table.

An iteration whose whole-table E-step is a single task (a corpus of one unit,
or local mode with as many ``estepThreads`` as cores) has that task's counts
as its totals: the task then normalises and writes the table itself, the same
files the reducers would write, and nothing is shuffled.
"""
from __future__ import annotations

import os
import re
import time
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from spark_align.config import RunConfig
from spark_align.engine import faults
from spark_align.engine import shipping
from spark_align.engine import tables as tables_mod
from spark_align.engine import mstep
from spark_align.engine.estep import make_estep
from spark_align.errors import ConfigError, NumericalError
from spark_align.store import FORMAT_VERSION, RunStore, fsspec_url

TASKS_PER_CORE = 2
# Spark setting that overrides TASKS_PER_CORE (``--conf spark.spark_align.estepTasksPerCore=1``).
TASKS_PER_CORE_CONF = "spark.spark_align.estepTasksPerCore"
# Threads per E-step task on the whole-table path (``--conf spark.spark_align.estepThreads=N``); see
# :func:`estep_tasks` and :func:`default_threads`.
THREADS_CONF = "spark.spark_align.estepThreads"


def tasks_per_core(value: str) -> int:
    """The E-step tasks per core a ``TASKS_PER_CORE_CONF`` value asks for (a whole number, at least 1)."""
    return whole_number_setting(TASKS_PER_CORE_CONF, value)


def local_cores(master: str) -> int | None:
    """The cores of a local-mode master (``local``, ``local[N]``, ``local[*]``, each also with ``,F``
    retries); None for any other master (``local-cluster[...]`` included)."""
    m = re.fullmatch(r"local(?:\[(\*|\d+)(?:,\d+)?\])?", master.strip())
    if m is None:
        return None
    if m.group(1) is None:
        return 1
    if m.group(1) != "*":
        return int(m.group(1))
    # the CPUs this process may run on (os.cpu_count counts those it may not, too)
    return len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else (os.cpu_count() or 1)


def default_threads(master: str) -> int:
    """``THREADS_CONF`` when it is not set: the cores of a local-mode master, 1 on any other.

    In local mode that makes the whole-table E-step one task on every core, which shares the worker's
    one table among its threads and writes the new table itself (nothing shuffled): at 1M pairs
    (local[2]) 9.0 s a Model 1 iteration against 11.9 s with one thread per task, and one Python
    worker of 2.4 GB where two held 1.8 GB each. A cluster keeps one thread per task: more need Spark's
    stage-level scheduling, which not every cluster manager offers (:func:`claim_task_cpus`)."""
    return local_cores(master) or 1


def estep_threads(spark) -> int:
    """Threads per whole-table E-step task this session asks for (``THREADS_CONF``, else the default)."""
    default = str(default_threads(spark.sparkContext.master))
    return whole_number_setting(THREADS_CONF, spark.conf.get(THREADS_CONF, default))


def estep_tasks(n_units: int, cores: int, per_core: int, threads: int, *, local: bool) -> int:
    """How many E-step tasks a whole-table iteration runs over ``n_units`` units on ``cores`` cores.

    One thread per task: ``per_core`` tasks per core. ``threads`` per task in local mode: one wave of
    ``cores // threads`` tasks, so that no more threads run than there are cores (Spark counts each task
    as one core there, and the E-step stage has no other tasks). On a cluster each task claims
    ``threads`` cores through stage-level scheduling, and there are ``per_core`` tasks per ``threads``
    cores."""
    if threads == 1:
        wanted = per_core * cores
    elif local:
        wanted = cores // threads
    else:
        wanted = per_core * cores // threads
    return max(1, min(n_units, wanted))


def claim_task_cpus(spark, rdd, threads: int):
    """``rdd`` with its tasks claiming ``threads`` cores each (a Spark task resource profile); ConfigError
    naming the cause where the cluster cannot do that or its executors have fewer cores."""
    from pyspark.resource import ResourceProfileBuilder, TaskResourceRequests

    executor_cores = spark.conf.get("spark.executor.cores", None)
    cluster = re.fullmatch(r"local-cluster\[\s*\d+\s*,\s*(\d+)\s*,\s*\d+\s*\]", spark.sparkContext.master)
    if cluster is not None:
        executor_cores = cluster.group(1)
    if executor_cores is not None and int(executor_cores) < threads:
        raise ConfigError(f"{THREADS_CONF}={threads} is more than the {executor_cores} core(s) of each executor")
    try:
        return rdd.withResources(ResourceProfileBuilder().require(TaskResourceRequests().cpus(threads)).build)
    except Exception as exc:  # py4j's error, carrying the scheduler's exception
        java = getattr(exc, "java_exception", None)
        cause = (java.getMessage() if java is not None else None) or str(exc).strip() or type(exc).__name__
        cause = cause.splitlines()[0]
        raise ConfigError(f"{THREADS_CONF}={threads} needs Spark's stage-level scheduling (a standalone, YARN or "
                          f"Kubernetes cluster with dynamic allocation off); this one refused: {cause}") from None


def n_reducers(spark) -> int:
    """Reducers of an iteration, and so buckets of the table it writes: ``spark.sql.shuffle.partitions``."""
    return max(1, int(spark.conf.get("spark.sql.shuffle.partitions")))


def whole_number_setting(name: str, value: str) -> int:
    """A Spark setting of ours that must be a whole number of at least 1; ConfigError otherwise."""
    try:
        n = int(value)
    except ValueError:
        n = 0
    if n < 1:
        raise ConfigError(f"{name} must be a whole number of at least 1, not {value!r}")
    return n


@dataclass
class TrainState:
    """Where training stands: the last committed (stage, iteration) and its parameters."""

    stage_index: int
    iteration: int          # 0 = the stage's starting point (no iteration done yet)
    table_path: str | None  # checkpoint table; None means the uniform initial table
    dense: dict[str, dict]  # direction -> dense params (numpy arrays)


def dense_to_json(dense: dict[str, dict]) -> dict:
    return {d: {k: np.asarray(v).tolist() for k, v in params.items()} for d, params in dense.items()}


def dense_from_json(obj: dict) -> dict[str, dict]:
    return {d: {k: np.asarray(v, dtype=np.float64) for k, v in params.items()} for d, params in obj.items()}


def init_table(spark, blocks_df, directions, init: str, seed: int, src_vocab: int, tgt_vocab: int):
    """Initial table as a DataFrame: uniform (1/|V|) or seeded random, normalised per cond word."""
    from pyspark.sql import Window
    from pyspark.sql import functions as F

    from spark_align.engine.ingest import DICT_ENTRIES_SCHEMA, dict_entries

    keys = blocks_df.mapInArrow(dict_entries, DICT_ENTRIES_SCHEMA).select("key").distinct()
    keys = keys.select(F.shiftright(F.col("key"), 32).cast("int").alias("src"),
                       (F.col("key").bitwiseAND(F.lit(0xFFFFFFFF))).cast("int").alias("tgt"))
    frames = []
    for d in directions:
        di = tables_mod.DIRS.index(d)
        kept = keys.filter(F.col("tgt") != 0) if d == "forward" else keys.filter(F.col("src") != 0)
        kept = kept.withColumn("dir", F.lit(di).cast("byte"))
        if init == "uniform":
            value = F.lit(1.0 / (tgt_vocab if d == "forward" else src_vocab))
            frames.append(kept.select("dir", "src", "tgt", value.alias("prob")))
            continue
        raw = (F.shiftrightunsigned(F.xxhash64("src", "tgt", F.lit(seed), F.lit(di)), 11).cast("double")
               / float(2 ** 53) + 1e-3)
        cond = "src" if d == "forward" else "tgt"
        frames.append(kept.withColumn("raw", raw).select(
            "dir", "src", "tgt", (F.col("raw") / F.sum("raw").over(Window.partitionBy(cond))).alias("prob")))
    out = frames[0]
    for f in frames[1:]:
        out = out.unionByName(f)
    return out


class Trainer:
    """Runs the stages of a :class:`RunConfig` over an ingested run directory."""

    def __init__(self, spark, cfg: RunConfig, store: RunStore, encoded: dict,
                 *, fingerprint: str, log: Callable[[str], None] = print, gold=None) -> None:
        self.spark, self.cfg, self.store, self.encoded = spark, cfg, store, encoded
        self.fingerprint, self.log = fingerprint, log
        self.gold = gold  # an engine.gold.GoldMonitor: scores gold pairs after each iteration (train --gold)
        self.directions = cfg.direction_list
        self.n_words = {"forward": encoded["n_tgt_tokens"], "reverse": encoded["n_src_tokens"]}
        self._last_per_word: dict[str, float] = {}
        self._units: list[tuple[str, int]] | None = None
        self._written_crc: dict[str, str] = {}

    def blocks(self):
        return self.spark.read.parquet(self.store.spark_path("encoded", "blocks"))

    def block_units(self) -> list[tuple[str, int]]:
        """(file, row group) of every row group of the encoded blocks, listed once per run."""
        if self._units is None:
            self._units = mstep.block_units(self.store)
        return self._units

    def n_reducers(self) -> int:
        return n_reducers(self.spark)

    # -- one iteration -------------------------------------------------------------------
    def iterate(self, model, state: TrainState) -> tuple[str, dict, dict]:
        """One EM iteration from ``state``; returns (table path, new dense, metrics).

        E-step tasks fold their counts and ship them by reducer bucket; reducers normalise and
        write the new table themselves (``engine.mstep``), or, with one E-step task, that task does
        (module docstring). The driver only plans and collects sums.
        """
        sc = self.spark.sparkContext
        src_v, tgt_v = self.encoded["src_vocab_size"], self.encoded["tgt_vocab_size"]
        n_entries = None if state.table_path is None else shipping.table_entries(self.spark, state.table_path)
        path = shipping.choose_shipping(self.cfg.shipping, n_entries, self.cfg.table_budget_mb)
        n_parts = self.n_reducers()
        stage = self.cfg.stages[state.stage_index]
        rel = RunStore.checkpoint_dir(state.stage_index, stage.model, state.iteration + 1)
        # Two tasks per core by default: every task ships the entries it touched, so fewer tasks
        # shuffle fewer bytes and leave the reducers less to merge (13 tasks shuffled 274 MB at 100k
        # pairs). One per core measured 9-13% faster per Model 1 iteration (8.3 against 9.0-9.5 s at
        # 1M pairs, local[2]) with 14% more peak worker memory (1726 against 1504-1520 MB); two leave
        # a retried or slow task less to redo and spread uneven tasks better over the cores. The
        # setting chooses.
        units = self.block_units()
        per_core = tasks_per_core(self.spark.conf.get(TASKS_PER_CORE_CONF, str(TASKS_PER_CORE)))
        n_tasks = max(1, min(len(units), per_core * sc.defaultParallelism))
        threads = estep_threads(self.spark)  # whole-table path
        if path == "join":
            flush_keys = whole_number_setting(shipping.TASK_KEYS_CONF, self.spark.conf.get(
                shipping.TASK_KEYS_CONF, str(shipping.TASK_KEYS)))
            route_seconds = sc.accumulator(0.0)
            used_threads, own_table = 1, False
            pairs = shipping.join_payloads(self.spark, self.store, units, state.table_path, model, self.directions,
                                           state.dense, n_tasks=n_tasks, n_buckets=n_parts, flush_keys=flush_keys,
                                           lookup_seconds=route_seconds)
        else:
            route_seconds = None
            # The first iteration, from the constant initial table, folds every count into a hash table
            # (no table-aligned accumulators): on two threads per task that took 30 s against 24 s at 1M
            # pairs (local[2]), so it runs one thread per task.
            used_threads = threads if state.table_path is not None else 1
            source = tables_mod.table_source(state.table_path, self.directions, src_v, tgt_v)
            local = local_cores(sc.master)
            cores = local if local is not None and used_threads > 1 else sc.defaultParallelism
            n_tasks = estep_tasks(len(units), cores, per_core, used_threads, local=local is not None)
            # One E-step task (one unit, or local mode with as many threads as cores): its counts are the
            # totals, so it writes the table itself and nothing is shuffled.
            own_table = n_tasks == 1
            estep = make_estep(model, self.directions, source, state.dense,
                               blocks_url=fsspec_url(self.store.spark_path("encoded", "blocks")), n_buckets=n_parts,
                               hints_url=fsspec_url(self.store.spark_path("encoded", "hints")), threads=used_threads,
                               write_table=dict(lex_url=fsspec_url(self.store.spark_path(rel, "lex")),
                                                min_prob=tables_mod.MIN_PROB, prune_below=self.cfg.prune_below)
                               if own_table else None)
            tasks = sc.parallelize(units, n_tasks)
            if threads > 1 and local is None:
                claimed = claim_task_cpus(self.spark, tasks, threads)  # a cluster that cannot: stopped at once
                tasks = claimed if used_threads > 1 else tasks
            pairs = tasks.mapPartitions(estep)
        self.store.remove(rel, "lex")  # what an interrupted attempt at this iteration left
        started = time.perf_counter()
        with faults.arm_task_kill(self.spark, "estep", stage.model, state.iteration + 1), \
                faults.kill_during_write("mstep-write", stage.model, state.iteration + 1,
                                         self.store.spark_path(rel, "lex")):
            if own_table:
                summaries = pairs.collect()
            else:
                summaries = mstep.reduce_and_write(
                    sc, pairs, n_parts, fsspec_url(self.store.spark_path(rel, "lex")), min_prob=tables_mod.MIN_PROB,
                    prune_below=self.cfg.prune_below)
        job_seconds = time.perf_counter() - started
        self.store.remove(rel, "lex", "_temporary")
        # what the reducers wrote, so that committing does not read the table back for its checksums
        self._written_crc = {mstep.part_name(s["part"]): s["crc32"] for s in summaries}
        sums = mstep.combine(summaries, self.directions, prune_below=self.cfg.prune_below)
        new_dense, metrics = {}, {}
        for d in self.directions:
            n = model.dense_size()
            vec = np.array([sums[d]["dense"].get(k, 0.0) for k in range(n)])
            new_dense[d] = model.m_step_dense(vec, state.dense[d])
            loglik = sums[d]["scalar"].get(0, float("nan"))
            per_word = loglik / self.n_words[d]
            if not np.isfinite(per_word):
                raise NumericalError(f"{stage.model} iteration {state.iteration + 1} ({d}): "
                                     f"log-likelihood is {loglik}")
            metrics[d] = {"loglik": loglik, "loglik_per_word": per_word, "perplexity": float(np.exp(-per_word)),
                          "kernel_seconds": sums[d]["scalar"].get(1, 0.0), "links": sums[d]["scalar"].get(2, 0.0),
                          "estep_task_seconds": sums[d]["scalar"].get(3, 0.0),
                          "lookup_seconds": sums[d]["scalar"].get(4, 0.0),
                          "accumulate_seconds": sums[d]["scalar"].get(5, 0.0),
                          "table_load_seconds": sums[d]["scalar"].get(6, 0.0),
                          "block_read_seconds": sums[d]["scalar"].get(7, 0.0),
                          "payload_seconds": sums[d]["scalar"].get(8, 0.0),
                          "lookup_keys_searched": sums[d]["scalar"].get(9, 0.0),
                          "lookup_keys": sums[d]["scalar"].get(10, 0.0),
                          "lookup_keys_trusted": sums[d]["scalar"].get(11, 0.0),
                          "reduce_task_seconds": float(sum(s["seconds"] for s in summaries)),
                          # the join path's lookup tasks (shipping.routed_entries); 0 on the broadcast path
                          "route_lookup_seconds": float(route_seconds.value) if route_seconds is not None else 0.0,
                          "job_seconds": job_seconds, "reducers": n_parts,
                          "estep_tasks": n_tasks, "estep_threads": used_threads,
                          # who normalised and wrote the table: the reducers, or the one E-step task
                          "mstep_by": "estep task" if own_table else "reducers",
                          "shipping": path, "table_entries": n_entries, "new_table_entries": sums[d]["entries"]}
            if sums[d]["pruned"] is not None:
                metrics[d]["pruned"] = sums[d]["pruned"]
            if self.cfg.prune_below is not None and d in self._last_per_word:
                # With pruning, this includes what the previous pruning cost (without it EM never decreases).
                metrics[d]["loglik_per_word_change"] = per_word - self._last_per_word[d]
            self._last_per_word[d] = per_word
        return self.store.spark_path(rel, "lex"), new_dense, metrics

    # -- the loop ----------------------------------------------------------------------
    def train(self, state: TrainState) -> TrainState:
        """Run every remaining iteration of every stage, committing a checkpoint after each."""
        stages = self.cfg.stages
        total_left = sum(s.n_iter for s in stages[state.stage_index:]) - state.iteration
        durations: list[float] = []
        while state.stage_index < len(stages):
            stage = stages[state.stage_index]
            model = stage.build()
            if state.iteration >= stage.n_iter:
                if state.stage_index + 1 == len(stages):
                    break
                next_model = stages[state.stage_index + 1].build()
                state = TrainState(state.stage_index + 1, 0, state.table_path,
                                   {d: next_model.init_dense(state.dense.get(d)) for d in self.directions})
                continue
            if state.iteration == 0 and not state.dense:
                state.dense = {d: model.init_dense(None) for d in self.directions}
            started = time.time()
            table_path, new_dense, metrics = self.iterate(model, state)
            seconds = time.time() - started
            if self.gold is not None:
                metrics["gold"] = self.gold.measure(model, table_path, new_dense)
            durations.append(seconds)
            total_left -= 1
            iteration = state.iteration + 1
            self._commit(state.stage_index, stage.model, iteration, stage.n_iter, metrics, new_dense, seconds)
            self.log(progress_line(stage.model, state.stage_index, iteration, stage.n_iter, metrics,
                                   seconds, total_left, float(np.mean(durations))))
            event = getattr(self.log, "event", None)
            if event is not None:  # structured progress (train --log-json): the figures of the line above
                event(iteration_event(stage.model, state.stage_index, iteration, stage.n_iter, metrics, seconds,
                                      total_left, float(np.mean(durations)),
                                      self.store.spark_path(RunStore.checkpoint_dir(state.stage_index, stage.model,
                                                                                    iteration))))
            state = TrainState(state.stage_index, iteration, table_path, new_dense)
        return state

    def _commit(self, stage_index, model_name, iteration, n_iter, metrics, dense, seconds) -> None:
        rel = RunStore.checkpoint_dir(stage_index, model_name, iteration)
        files = self.store.files(rel, "lex")
        self.store.write_json(f"{rel}/manifest.json", {
            "format_version": FORMAT_VERSION,
            "stage_index": stage_index,
            "stage": model_name,
            "iteration": iteration,
            "stage_iterations": n_iter,
            "directions": list(self.directions),
            "metrics": metrics,
            "dense": dense_to_json(dense),
            "seconds": seconds,
            "table": {"path": "lex", "files": files,
                      "crc32": self.store.checksums(rel, "lex", known=self._written_crc)},
            "config": self.cfg.to_dict(),
            "corpus_fingerprint": self.fingerprint,
            "committed_at": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
        }, kill_point=("manifest", model_name, iteration))


def iteration_event(model: str, stage_index: int, iteration: int, n_iter: int, metrics: dict, seconds: float,
                    left: int, mean_seconds: float, checkpoint: str) -> dict:
    """One committed iteration as a JSON-ready record (what ``progress_line`` prints, unrounded).

    A ``log`` callable given to :class:`Trainer` that has an ``event`` attribute
    receives this record after each iteration's line.
    """
    return {"event": "iteration", "time": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
            "stage": stage_index + 1, "model": model, "iteration": iteration, "stage_iterations": n_iter,
            "seconds": seconds, "iterations_left": left, "eta_seconds": left * mean_seconds,
            "checkpoint": checkpoint, "metrics": metrics}


def progress_line(model: str, stage_index: int, iteration: int, n_iter: int, metrics: dict,
                  seconds: float, left: int, mean_seconds: float) -> str:
    parts = [f"[stage {stage_index + 1} {model} {iteration}/{n_iter}]"]
    for d, m in metrics.items():
        if d == "gold":
            continue
        parts.append(f"{d}: loglik/word {m['loglik_per_word']:.4f} ppl {m['perplexity']:.2f}")
        if "pruned" in m:
            pr = m["pruned"]
            change = m.get("loglik_per_word_change")
            parts.append(f"{d}: pruned {pr['removed']} of {pr['removed'] + pr['kept']} entries (mass "
                         f"{pr['removed_mass']:.3g})" + (f", loglik/word change {change:+.5f}" if change is not None
                                                         else ""))
    if "gold" in metrics:
        from spark_align.engine.gold import progress_part

        parts.append(progress_part(metrics["gold"]))
    parts.append(f"{seconds:.1f}s")
    parts.append(f"{left} iteration(s) left, ~{left * mean_seconds:.0f}s" if left else "training done")
    return " | ".join(parts)
