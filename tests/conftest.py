"""Shared fixtures: one Spark session per test session (local[2], UI off, WARN logs)."""
from __future__ import annotations

import os
import sys

import pytest

os.environ.setdefault("PYSPARK_PYTHON", sys.executable)


@pytest.fixture(scope="session")
def spark():
    from spark_align.engine.session import get_session

    # Idle Python workers: one per core, not local mode's one (engine.session.one_task_estep). Results do
    # not depend on it; with one, the many small multi-task jobs of the tests fork workers again and
    # again (the suite took 12 min against 9).
    session = get_session("local[2]", {"spark.sql.shuffle.partitions": "4", "spark.default.parallelism": "2",
                                      "spark.python.factory.idleWorkerMaxPoolSize": "2"},
                          app_name="spark_align-tests")
    yield session
    session.stop()


@pytest.fixture
def run_dir(tmp_path):
    return str(tmp_path / "run")


def pytest_collection_modifyitems(items):
    for item in items:
        if "spark" in getattr(item, "fixturenames", ()):
            item.add_marker(pytest.mark.spark)
