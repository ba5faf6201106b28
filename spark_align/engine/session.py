"""The Spark session: one place that knows which settings the jobs rely on.

Settings that matter to correctness or speed of the jobs (Arrow batches sized
for encoded blocks, UI off by default in local mode, quiet logs) are set here;
a profile (``--profile``, ``conf/*.toml``) goes over them, spark-submit's own
settings over the profile, and anything the user passes with ``--conf`` wins.
"""
from __future__ import annotations

import os
import sys

LOCAL_DRIVER_MEMORY = "4g"  # a maximum heap, not a reservation; override with --conf spark.driver.memory=...

DEFAULT_CONF = {
    "spark.sql.execution.arrow.pyspark.enabled": "true",
    # Encoded blocks are a few MB each: bound Arrow batches by bytes, not only rows.
    "spark.sql.execution.arrow.maxBytesPerBatch": str(64 * 1024 * 1024),
    "spark.sql.execution.arrow.maxRecordsPerBatch": "4096",
    # One encoded block row holds thousands of pairs (MBs of lists): Spark's default of 4096 rows per
    # Parquet column batch held whole row groups of blocks in the heap and ran out at 300k pairs.
    "spark.sql.parquet.columnarReaderBatchSize": "64",
    "spark.python.worker.reuse": "true",
    "spark.sql.shuffle.partitions": "8",
    "spark.sql.adaptive.enabled": "true",
    "spark.ui.showConsoleProgress": "false",
    "spark.sql.session.timeZone": "UTC",
}


def submitted_settings() -> dict[str, str]:
    """Settings ``spark-submit`` gave this driver (its ``--conf``, ``--master``, spark-defaults.conf).

    Empty unless this Python process was started by ``spark-submit`` (which hands
    it the JVM gateway through ``PYSPARK_GATEWAY_PORT``).
    """
    if "PYSPARK_GATEWAY_PORT" not in os.environ:
        return {}
    from pyspark import SparkContext

    SparkContext._ensure_initialized()  # connects to the JVM spark-submit started
    jconf = SparkContext._jvm.SparkConf(True)
    return {kv._1(): kv._2() for kv in jconf.getAll()}


def effective_settings(master: str | None = None, conf: dict[str, str] | None = None,
                       profile=None, submitted: dict[str, str] | None = None,
                       fallback_master: str | None = None) -> tuple[str, dict[str, str]]:
    """(master, settings) from, lowest to highest precedence: :data:`DEFAULT_CONF`, the profile
    (a :class:`spark_align.profiles.Profile`), what spark-submit gave, then ``conf``.

    The master is ``master`` if given, else spark-submit's, else ``fallback_master`` (a run
    file's), else the profile's, else ``local[*]``.
    """
    submitted = submitted or {}
    chosen = (master or submitted.get("spark.master") or fallback_master or (profile.master if profile else None)
              or "local[*]")
    settings = dict(DEFAULT_CONF)
    if chosen.startswith("local"):
        settings["spark.ui.enabled"] = "false"
        # Local mode runs tasks in the driver JVM, whose heap also holds broadcast tables and the
        # aggregated counts: Spark's 1g default runs out at a few hundred thousand pairs.
        settings["spark.driver.memory"] = LOCAL_DRIVER_MEMORY
    if profile is not None:
        settings.update(profile.settings)
    settings.update({k: v for k, v in submitted.items() if k != "spark.master"})
    settings.update(conf or {})
    if one_task_estep(chosen, settings):
        settings.setdefault(IDLE_WORKERS_CONF, "1")
    return chosen, settings


IDLE_WORKERS_CONF = "spark.python.factory.idleWorkerMaxPoolSize"


def one_task_estep(master: str, settings: dict[str, str]) -> bool:
    """Whether a local-mode E-step is one task on every core (``estepThreads`` at least the cores, as by
    default: ``engine.em.default_threads``).

    Then only one idle Python worker is kept (:data:`IDLE_WORKERS_CONF`, unless set): Spark hands out
    its idle workers oldest first, so two would take turns at the iterations' one task, each reading
    every other table afresh and keeping a table of its own; with one, every iteration's task finds
    the table it read last, and the other worker's memory is freed. At 1M pairs (local[2], two
    threads) iterations 1-3 took 19.4, 14.2 and 7.3 s against 23.7, 18.4 and 13.9 s. The cost falls on
    jobs of several Python tasks at once (ingestion, the first iteration, the join path, the output),
    which fork the other worker afresh each time, imports and all: noise in a run of any size, but a
    test that retrains a small corpus a dozen times on the join path took 104 s against 42 s."""
    from spark_align.engine.em import THREADS_CONF, default_threads, estep_tasks, local_cores

    cores = local_cores(master)
    try:
        threads = int(settings.get(THREADS_CONF, str(default_threads(master))))
    except ValueError:
        return False  # refused with its reason when training starts
    # the E-step's own rule for its number of tasks, over a corpus of many units
    return cores is not None and cores > 1 and threads > 1 and estep_tasks(1 << 30, cores, 1, threads, local=True) == 1


def get_session(master: str | None = "local[*]", conf: dict[str, str] | None = None,
                app_name: str = "spark_align", *, profile=None, fallback_master: str | None = None):
    """Get (or create) the Spark session with the project defaults, ``profile`` and ``conf``.

    ``master=None`` takes spark-submit's ``--master``, else the profile's, else ``local[*]``.
    Under spark-submit, its own settings win over the profile's (see :func:`effective_settings`).
    """
    from pyspark.sql import SparkSession

    # Executors must run the same Python as the driver (local and local-cluster modes).
    os.environ.setdefault("PYSPARK_PYTHON", sys.executable)
    os.environ.setdefault("PYSPARK_DRIVER_PYTHON", sys.executable)
    submitted = submitted_settings()
    master, settings = effective_settings(master, conf, profile, submitted, fallback_master)
    if "spark.app.name" in submitted:
        app_name = submitted["spark.app.name"]
    builder = SparkSession.builder.master(master).appName(app_name)
    for key, value in settings.items():
        builder = builder.config(key, value)
    spark = builder.getOrCreate()
    # Python workers only (the environment of Python tasks, not of executor JVMs): one malloc arena, read
    # by glibc when a worker starts (see engine.tables.keep_freed_memory); spark.executorEnv wins.
    spark.sparkContext.environment.setdefault("MALLOC_ARENA_MAX", "1")
    spark.sparkContext.setLogLevel(settings.get("spark.log.level", "WARN"))
    _quiet(spark, "org.apache.spark.sql.execution.window.WindowExec")  # vocabulary ids use one global sort
    return spark


def _quiet(spark, logger: str) -> None:
    jvm = spark.sparkContext._jvm
    try:
        level = jvm.org.apache.logging.log4j.Level.ERROR
        jvm.org.apache.logging.log4j.core.config.Configurator.setLevel(logger, level)
    except Exception:  # noqa: BLE001 - logging tweaks must never stop a run
        pass
