"""Running ``spark-align train`` as a real process (its own JVM) and making sure nothing it started survives.

Every process is started in a new session (so it leads its own process group)
with a unique ``SPARK_ALIGN_TEST_TAG`` in its environment. The JVM and the
Python workers inherit that environment, so the test finds every process the
run started by its tag (``/proc/PID/environ``), even those Spark moved into
another process group, and can check that none survive a kill.
"""
from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
import uuid
from dataclasses import dataclass

import pyarrow as pa
import pyarrow.parquet as pq

REPO = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
TAG_ENV = "SPARK_ALIGN_TEST_TAG"
# Small settings keep each subprocess run short on a 2-core machine.
FAST_CONF = ("--conf", "spark.sql.shuffle.partitions=3", "--conf", "spark.default.parallelism=2")


@dataclass
class Finished:
    returncode: int
    stdout: str
    stderr: str
    strays: list[str]  # command lines of processes of the run still alive after the grace period


def tagged_pids(tag: str) -> dict[int, str]:
    """pid -> command line of every live process whose environment carries ``tag``."""
    needle = f"{TAG_ENV}={tag}".encode()
    found = {}
    for name in os.listdir("/proc"):
        if not name.isdigit():
            continue
        try:
            with open(f"/proc/{name}/environ", "rb") as fh:
                if needle not in fh.read().split(b"\0"):
                    continue
            with open(f"/proc/{name}/cmdline", "rb") as fh:
                cmd = fh.read().replace(b"\0", b" ").decode(errors="replace").strip()
            with open(f"/proc/{name}/stat") as fh:
                if fh.read().rsplit(")", 1)[1].split()[0] == "Z":
                    continue  # a zombie is already dead
        except OSError:
            continue
        found[int(name)] = cmd
    return found


def run_train(args: list[str], *, env: dict[str, str] | None = None, timeout: float = 300,
              grace: float = 30) -> Finished:
    """Run ``python -m spark_align.cli train ARGS`` to its end (or its death); reap everything it started."""
    tag = uuid.uuid4().hex
    full_env = {**os.environ, TAG_ENV: tag, "PYSPARK_PYTHON": sys.executable, **(env or {})}
    proc = subprocess.Popen([sys.executable, "-m", "spark_align.cli", "train", *args], cwd=REPO, env=full_env,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, start_new_session=True)
    try:
        out, err = proc.communicate(timeout=timeout)
    except subprocess.TimeoutExpired:
        os.killpg(proc.pid, signal.SIGKILL)
        out, err = proc.communicate()
    # Spark's JVM and Python workers must go away on their own once the driver is gone.
    deadline = time.monotonic() + grace
    strays = tagged_pids(tag)
    while strays and time.monotonic() < deadline:
        time.sleep(0.2)
        strays = tagged_pids(tag)
    for pid in strays:  # leave nothing behind even when the test fails
        try:
            os.kill(pid, signal.SIGKILL)
        except ProcessLookupError:
            pass
    return Finished(proc.returncode, out, err, sorted(strays.values()))


def sorted_table(path: str, keys: list[str]) -> pa.Table:
    return pq.read_table(path).sort_by([(k, "ascending") for k in keys])


def lex_table(run_dir: str, stage_dir: str, iteration: int) -> pa.Table:
    return sorted_table(os.path.join(run_dir, "checkpoints", stage_dir, f"iter-{iteration:04d}", "lex"),
                        ["dir", "src", "tgt"])


def output_table(run_dir: str) -> pa.Table:
    return sorted_table(os.path.join(run_dir, "output"), ["_row"])
