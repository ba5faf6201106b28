"""Test-only fault injection: kill the whole run at a named point. Never set it in production.

``SPARK_ALIGN_TEST_KILL_AT=POINT[:MODEL[:ITERATION]]`` makes the run kill itself
with SIGKILL (no cleanup, no ``finally``, exactly like a lost machine) when it
reaches ``POINT`` in iteration ``ITERATION`` of stage model ``MODEL`` (a missing
part matches anything). For the output points, MODEL:ITERATION name the
checkpoint being decoded. Points:

* ``estep``: inside an E-step task (the task kills the driver);
* ``mstep-write``: while the iteration's new table is being written (Spark's
  ``_temporary`` directory exists);
* ``manifest``: halfway through writing the iteration's manifest (a truncated
  temporary file is left beside where ``manifest.json`` would go);
* ``output-write``: while the output corpus is being written;
* ``output-commit``: halfway through writing ``output.json``.

If the driver leads its process group (as when a test starts it with a new
session) the whole group is killed at once: the driver and its JVM. Python
workers that Spark runs in their own group exit when the JVM's pipes close.
"""
from __future__ import annotations

import contextlib
import os
import signal
import sys
import threading
import time

KILL_AT_ENV = "SPARK_ALIGN_TEST_KILL_AT"
# Optional: a file the kill message is also appended to (synced) before the kill. A kill from a task can
# end the JVM before it forwards the worker's stderr, so tests read this file instead of stderr.
KILL_LOG_ENV = "SPARK_ALIGN_TEST_KILL_LOG"
TASK_PROPERTY = "spark_align.test.kill_target"  # Spark local property: "pg:PGID" or "pid:PID"


def wanted(point: str, model: str | None = None, iteration: int | None = None) -> bool:
    """Whether ``SPARK_ALIGN_TEST_KILL_AT`` asks for a kill at this point."""
    spec = os.environ.get(KILL_AT_ENV)
    if not spec:
        return False
    parts = spec.strip().split(":")
    if parts[0] != point:
        return False
    if len(parts) > 1 and parts[1] and parts[1] != model:
        return False
    return not (len(parts) > 2 and parts[2] and str(iteration) != parts[2])


def _target() -> str:
    return f"pg:{os.getpgrp()}" if os.getpgrp() == os.getpid() else f"pid:{os.getpid()}"


def _kill(target: str, why: str) -> None:
    message = f"spark-align: test kill ({KILL_AT_ENV}): {why}"
    print(message, file=sys.stderr, flush=True)
    log = os.environ.get(KILL_LOG_ENV)
    if log:
        with open(log, "a") as fh:
            fh.write(message + "\n")
            fh.flush()
            os.fsync(fh.fileno())
    kind, _, num = target.partition(":")
    if kind == "pg":
        os.killpg(int(num), signal.SIGKILL)
    else:
        os.kill(int(num), signal.SIGKILL)
    time.sleep(60)  # never reached: SIGKILL cannot be caught


def kill_now(why: str) -> None:
    """Kill the driver (and its process group if it leads one) immediately."""
    _kill(_target(), why)


@contextlib.contextmanager
def arm_task_kill(spark, point: str, model: str, iteration: int):
    """While active, the first task that calls :func:`kill_in_task` kills the driver."""
    if not wanted(point, model, iteration):
        yield
        return
    sc = spark.sparkContext
    sc.setLocalProperty(TASK_PROPERTY, f"{_target()}|{point}:{model}:{iteration}")
    try:
        yield
    finally:
        sc.setLocalProperty(TASK_PROPERTY, None)


def kill_in_task() -> None:
    """Called at the start of E-step tasks: kill the driver if :func:`arm_task_kill` armed it."""
    from pyspark import TaskContext

    ctx = TaskContext.get()
    armed = ctx.getLocalProperty(TASK_PROPERTY) if ctx is not None else None
    if armed:
        target, _, where = armed.partition("|")
        _kill(target, f"{where} in task {ctx.partitionId()}")


@contextlib.contextmanager
def kill_during_write(point: str, model: str | None, iteration: int | None, out_url: str):
    """Kill while Spark writes ``out_url`` (a local path): as soon as its ``_temporary`` appears.

    If the write finishes before the watcher sees it, the kill happens right after.
    """
    if not wanted(point, model, iteration):
        yield
        return
    path = out_url[len("file:"):] if out_url.startswith("file:") else out_url
    marker = os.path.join(path, "_temporary")
    where = f"{point}:{model}:{iteration}"
    done = threading.Event()

    def watch() -> None:
        while not done.is_set():
            if os.path.exists(marker):
                kill_now(f"{where} while files are being written")
            time.sleep(0.001)

    threading.Thread(target=watch, daemon=True).start()
    try:
        yield
    finally:
        done.set()
    kill_now(f"{where} after the write (it finished before the watcher saw it)")
