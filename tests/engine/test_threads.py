"""Threads in the whole-table E-step: how many tasks, how units are shared out, and the errors.

That threaded tasks give the same tables bit for bit is checked in ``test_shipping`` (local mode) and
``tests/cluster/test_submit`` (a standalone cluster whose tasks claim two cores each).
"""
from __future__ import annotations

import threading
import time

import pytest

from spark_align.engine import em
from spark_align.engine.estep import run_shared
from spark_align.errors import ConfigError


def test_local_cores_reads_local_masters_only(monkeypatch):
    # local[*]: the CPUs this process may run on (its affinity), as many as Spark's cores where no quota applies
    monkeypatch.setattr(em.os, "sched_getaffinity", lambda _pid: set(range(6)))
    monkeypatch.setattr(em.os, "cpu_count", lambda: 64)
    assert [em.local_cores(m) for m in ("local", "local[3]", "local[*]", "local[4,2]", "local[*,3]")] == [1, 3, 6, 4, 6]
    assert [em.local_cores(m) for m in ("local-cluster[2,1,1024]", "spark://h:7077", "yarn", "k8s://x")] == [None] * 4


def test_estep_tasks():
    # one thread: tasks per core, as before threads existed
    assert em.estep_tasks(100, 4, 2, 1, local=True) == 8
    # local mode: one wave, never more threads than cores
    assert em.estep_tasks(100, 4, 2, 2, local=True) == 2
    assert em.estep_tasks(100, 2, 2, 3, local=True) == 1
    # a cluster: tasks per core over the cores each task claims
    assert em.estep_tasks(100, 16, 2, 4, local=False) == 8
    # never more tasks than units, never fewer than one
    assert em.estep_tasks(3, 16, 2, 1, local=False) == 3 and em.estep_tasks(0, 2, 2, 1, local=True) == 1


class _Loop:
    def __init__(self, fail_on=None, delay=0.0):
        self.done, self.fail_on, self.delay = [], fail_on, delay
        self.threads = set()

    def run(self, unit):
        self.threads.add(threading.get_ident())
        time.sleep(self.delay)
        if unit == self.fail_on:
            raise ValueError(f"bad unit {unit}")
        self.done.append(unit)


def test_run_shared_runs_every_unit_once_each_loop_in_a_thread_of_its_own():
    loops = [_Loop(delay=0.002) for _ in range(3)]
    run_shared(loops, list(range(40)))
    assert sorted(u for loop in loops for u in loop.done) == list(range(40))
    assert all(loop.done for loop in loops)  # each thread took some
    assert all(len(loop.threads) == 1 for loop in loops)
    assert len(set.union(*(loop.threads for loop in loops))) == 3
    single = _Loop()
    run_shared([single], [1, 2, 3])
    assert single.done == [1, 2, 3] and single.threads == {threading.get_ident()}


def test_run_shared_raises_the_first_error_and_stops_taking_units():
    loops = [_Loop(fail_on=5, delay=0.002), _Loop(fail_on=5, delay=0.002)]
    with pytest.raises(ValueError, match="bad unit 5"):
        run_shared(loops, list(range(1000)))
    assert len([u for loop in loops for u in loop.done]) < 100


class _Conf:
    def __init__(self, values):
        self.values = values

    def get(self, key, default=None):
        return self.values.get(key, default)


class _Session:
    def __init__(self, master, values):
        self.conf = _Conf(values)
        self.sparkContext = type("Ctx", (), {"master": master})()


def test_threads_per_task_default_to_the_cores_in_local_mode_and_to_one_elsewhere():
    assert [em.estep_threads(_Session(m, {})) for m in ("local[3]", "local", "local-cluster[2,2,1024]",
                                                        "spark://h:7077", "yarn")] == [3, 1, 1, 1, 1]
    assert em.estep_threads(_Session("local[3]", {em.THREADS_CONF: "1"})) == 1
    assert em.estep_threads(_Session("yarn", {em.THREADS_CONF: "4"})) == 4
    with pytest.raises(ConfigError, match="estepThreads must be a whole number"):
        em.estep_threads(_Session("local[3]", {em.THREADS_CONF: "all"}))


def test_claiming_more_cores_than_an_executor_has_is_a_config_error():
    with pytest.raises(ConfigError, match="estepThreads=2 is more than the 1 core"):
        em.claim_task_cpus(_Session("local-cluster[2,1,1024]", {}), None, 2)
    with pytest.raises(ConfigError, match="estepThreads=4 is more than the 2 core"):
        em.claim_task_cpus(_Session("spark://h:7077", {"spark.executor.cores": "2"}), None, 4)


def test_a_cluster_without_stage_level_scheduling_is_a_config_error(spark):
    # Spark's local mode has no task resource profiles: the scheduler's refusal, named in one line.
    rdd = spark.sparkContext.parallelize(range(4), 2)
    with pytest.raises(ConfigError, match="needs Spark's stage-level scheduling.*refused: .*TaskResourceProfiles"):
        em.claim_task_cpus(spark, rdd, 2)
    with pytest.raises(ConfigError, match="estepThreads must be a whole number"):
        em.whole_number_setting(em.THREADS_CONF, "0")


def test_python_workers_start_with_one_malloc_arena(spark):
    """A task's threads share one C heap (engine.tables.keep_freed_memory): the sessions this project
    makes start Python workers with MALLOC_ARENA_MAX=1, which glibc reads once, at a process's start."""
    import os

    assert spark.sparkContext.environment["MALLOC_ARENA_MAX"] == "1"
    got = spark.sparkContext.parallelize([0, 1], 2).map(lambda _: os.environ.get("MALLOC_ARENA_MAX")).collect()
    assert got == ["1", "1"]
