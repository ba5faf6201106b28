"""The Spark session: one place that knows which settings the jobs rely on.

Settings that matter to correctness or speed of the jobs (Arrow batches sized
for encoded blocks, UI off by default in local mode, quiet logs) are set here;
anything the user passes with ``--conf`` wins.
"""
from __future__ import annotations

import os
import sys

DEFAULT_CONF = {
    "spark.sql.execution.arrow.pyspark.enabled": "true",
    # Encoded blocks are a few MB each: bound Arrow batches by bytes, not only rows.
    "spark.sql.execution.arrow.maxBytesPerBatch": str(64 * 1024 * 1024),
    "spark.sql.execution.arrow.maxRecordsPerBatch": "4096",
    "spark.python.worker.reuse": "true",
    "spark.sql.shuffle.partitions": "8",
    "spark.sql.adaptive.enabled": "true",
    "spark.ui.showConsoleProgress": "false",
    "spark.sql.session.timeZone": "UTC",
}


def get_session(master: str = "local[*]", conf: dict[str, str] | None = None, app_name: str = "spark_align"):
    """Get (or create) the Spark session with the project defaults plus ``conf``."""
    from pyspark.sql import SparkSession

    # Executors must run the same Python as the driver (local and local-cluster modes).
    os.environ.setdefault("PYSPARK_PYTHON", sys.executable)
    os.environ.setdefault("PYSPARK_DRIVER_PYTHON", sys.executable)
    settings = dict(DEFAULT_CONF)
    if master.startswith("local"):
        settings["spark.ui.enabled"] = "false"
    settings.update(conf or {})
    builder = SparkSession.builder.master(master).appName(app_name)
    for key, value in settings.items():
        builder = builder.config(key, value)
    spark = builder.getOrCreate()
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
