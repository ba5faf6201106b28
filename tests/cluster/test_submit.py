"""spark-submit on real multi-process Spark: a standalone cluster on loopback, and local-cluster mode.

What local mode hides is shipping code and data to executors in other
processes. Here the code reaches them only through the --py-files zip (driver
and executors run a Python that does not have spark_align installed), the run
is described by a TOML run file with the shipped ``standalone`` profile, and the
results must equal, bit for bit, a local-mode run of the same file (the count
reduction is exact integers, so partitioning and task placement cannot matter).

Processes: one Spark master and two workers (``spark-class`` from the installed
PySpark, bound to 127.0.0.1, random free ports, 2 cores / 1 GB each), each in its
own process group, stopped by fixture finalizers whatever the tests do.
"""
from __future__ import annotations

import json
import os
import shutil
import subprocess
from pathlib import Path

import pyarrow.parquet as pq
import pytest

import pyspark
from spark_align.cli import build_parser
from spark_align.commands.train import config_from_args
from spark_align.corpus import synthetic
from spark_align.engine import em
from spark_align.engine.run import train
from spark_align.profiles import apply_run_file
from tests.cluster.procs import free_port, group_alive, start_group, stop_group, wait_http

pytestmark = pytest.mark.slow

REPO = Path(__file__).resolve().parents[2]
SPARK_HOME = os.path.dirname(pyspark.__file__)
SUBMIT_TIMEOUT = 600  # seconds; a hung job fails the test instead of hanging CI

RUN_FILE = """\
# The cluster tests' run: both directions, a Model 1 and an HMM iteration (dense parameters too).
[corpus]
path = "{corpus}"
id_column = "id"

[training]
stages = ["ibm1:1", "hmm:1"]
directions = "both"
block_size = 40

[output]
symmetrization = "grow-diag-final-and"

[spark]
profile = "standalone"

[spark.conf]
# Fit the test cluster's 2-core / 1 GB workers (one core per executor unless a submission asks for two);
# the rest comes from the standalone profile.
"spark.executor.memory" = "512m"
"spark.executor.cores" = 1
"spark.executor.memoryOverhead" = "384m"
"spark.sql.shuffle.partitions" = 6
"spark.default.parallelism" = 4
"""


def spark_env(python: str) -> dict[str, str]:
    env = {k: v for k, v in os.environ.items() if k not in ("PYTHONPATH", "PYSPARK_GATEWAY_PORT",
                                                            "PYSPARK_GATEWAY_SECRET", "SPARK_CONF_DIR")}
    env.update(SPARK_HOME=SPARK_HOME, SPARK_LOCAL_IP="127.0.0.1", SPARK_DAEMON_MEMORY="256m",
               SPARK_NO_DAEMONIZE="1", PYSPARK_PYTHON=python, PYSPARK_DRIVER_PYTHON=python)
    return env


@pytest.fixture(scope="module")
def workspace(tmp_path_factory):
    """A directory outside the checkout with the corpus and the run file."""
    work = tmp_path_factory.mktemp("cluster")
    table = synthetic.generate(200, seed=11).select(["id", "source", "target"])
    corpus = work / "corpus.parquet"
    pq.write_table(table, corpus)
    (work / "run.toml").write_text(RUN_FILE.format(corpus=corpus), encoding="utf-8")
    return work


@pytest.fixture(scope="module")
def reference(spark, workspace):
    """The same run file trained in local mode, in this process (the shared local[2] session)."""
    parser, _ = build_parser()
    run_dir = str(workspace / "reference")
    args = parser.parse_args(["train", "--config", str(workspace / "run.toml"), "--run", run_dir])
    apply_run_file(args)
    train(spark, config_from_args(args), run_dir, log=lambda line: None)
    return run_dir


@pytest.fixture(scope="module")
def standalone(tmp_path_factory, bare_py):
    """A Spark standalone master and two workers on 127.0.0.1, started (not yet waited for).

    Yields the master URL, the workers' work dirs and ``ready()``, which waits until
    the master reports two live workers.
    """
    base = tmp_path_factory.mktemp("standalone")
    env = spark_env(bare_py)
    env["SPARK_LOG_DIR"] = str(base)
    port, ui_port = free_port(), free_port()
    spark_class = os.path.join(SPARK_HOME, "bin", "spark-class")
    procs = []
    try:
        procs.append(start_group([spark_class, "org.apache.spark.deploy.master.Master", "--host", "127.0.0.1",
                                  "--port", str(port), "--webui-port", str(ui_port)],
                                 log_path=str(base / "master.log"), env=env, cwd=str(base)))
        master = f"spark://127.0.0.1:{port}"
        work_dirs = []
        for i in (1, 2):
            work_dir = base / f"worker{i}"
            work_dir.mkdir()
            work_dirs.append(work_dir)
            procs.append(start_group([spark_class, "org.apache.spark.deploy.worker.Worker", "--host", "127.0.0.1",
                                      "--cores", "2", "--memory", "1g", "--webui-port", "0",
                                      "--work-dir", str(work_dir), master],
                                     log_path=str(base / f"worker{i}.log"), env=env, cwd=str(base)))

        def two_alive(body: bytes) -> bool:
            # While the master starts, its UI can answer /json/ with an HTML page (seen on
            # PySpark 4.3 for a fraction of a second): that is "not ready yet", not an error.
            try:
                state = json.loads(body)
            except ValueError:
                return False
            return sum(w["state"] == "ALIVE" for w in state.get("workers", [])) == 2

        def ready() -> None:
            wait_http(f"http://127.0.0.1:{ui_port}/json/", 240, check=two_alive, proc=procs[0],
                      what="Spark master with two workers")

        yield {"master": master, "work_dirs": work_dirs, "ready": ready}
    finally:
        for proc in reversed(procs):
            stop_group(proc)
        left = [p.pid for p in procs if group_alive(p.pid)]
        assert not left, f"process groups still alive after teardown: {left}"


def start_submit(workspace, bare_py, package_zip, master: str, name: str, *extra: str):
    """Start spark-submit of jobs/train.py with the zip; returns (process, run dir, submit log path)."""
    run_dir = workspace / name
    log_path = workspace / f"{name}.submit.log"
    cmd = [os.path.join(SPARK_HOME, "bin", "spark-submit"), "--master", master, "--py-files", package_zip,
           # No driver UI: a test must not compete for port 4040 with whatever else runs here.
           "--conf", "spark.log.level=WARN", "--conf", "spark.ui.enabled=false", str(REPO / "jobs" / "train.py"),
           "--config", str(workspace / "run.toml"), "--run", f"file://{run_dir}",
           "--log-json", str(workspace / f"{name}.jsonl"), *extra]
    proc = start_group(cmd, log_path=str(log_path), env=spark_env(bare_py), cwd=str(workspace))
    return proc, str(run_dir), log_path


def finish(proc, run_dir, log_path) -> tuple[int, str, str]:
    """Wait for a submission; returns (exit code, run dir, submit log). Its process group is stopped."""
    try:
        code = proc.wait(timeout=SUBMIT_TIMEOUT)
    except subprocess.TimeoutExpired:
        code = -1
    finally:
        stop_group(proc)  # the driver's Python workers and anything else it left
    return code, run_dir, log_path.read_text(errors="replace")


@pytest.fixture(scope="module")
def runs(request, workspace, standalone, bare_py, package_zip):
    """Both cluster submissions and the local reference, overlapped in time (the machine has 2 cores
    and most of each run is waiting on JVM start-up and scheduling)."""
    started = {}
    try:
        # per-unit shipping here (routes, lookups, routed decoding in executors of their own); the
        # reference and the standalone run broadcast: the results must still be equal, bit for bit
        started["local-cluster"] = start_submit(workspace, bare_py, package_zip, "local-cluster[2,1,1024]",
                                                "local-cluster", "--shipping", "join")
        standalone["ready"]()
        # two-core executors whose E-step tasks claim both cores and run two threads each
        started["standalone"] = start_submit(workspace, bare_py, package_zip, standalone["master"], "standalone",
                                             "--conf", "spark.executor.cores=2", "--conf", f"{em.THREADS_CONF}=2")
        reference = request.getfixturevalue("reference")
        results = {name: finish(*job) for name, job in started.items()}
    finally:
        for proc, _, _ in started.values():
            stop_group(proc)
    return {"reference": reference, **results}


def submit(workspace, bare_py, package_zip, master: str, name: str, *extra: str) -> tuple[int, str, str]:
    return finish(*start_submit(workspace, bare_py, package_zip, master, name, *extra))


def sorted_table(path: str):
    table = pq.read_table(path)
    return table.sort_by([(c, "ascending") for c in table.column_names if c in ("dir", "src", "tgt", "_row", "id")])


def checkpoint_dirs(run_dir: str) -> list[str]:
    base = Path(run_dir) / "checkpoints"
    return sorted(str(p.relative_to(run_dir)) for p in base.glob("*/iter-*"))


def assert_same_results(run_dir: str, reference: str) -> None:
    """Every table, vocabulary, model parameter and output row equal to the local-mode run's."""
    ckpts = checkpoint_dirs(reference)
    assert ckpts == checkpoint_dirs(run_dir) and len(ckpts) == 2
    for rel in ckpts:
        got, want = sorted_table(f"{run_dir}/{rel}/lex"), sorted_table(f"{reference}/{rel}/lex")
        assert got.num_rows > 1000 and got.equals(want), f"{rel}: translation tables differ"
        m_got = json.loads(Path(run_dir, rel, "manifest.json").read_text())
        m_want = json.loads(Path(reference, rel, "manifest.json").read_text())
        assert m_got["dense"] == m_want["dense"], rel
        for d in ("forward", "reverse"):
            assert m_got["metrics"][d]["loglik"] == m_want["metrics"][d]["loglik"], (rel, d)
    for side in ("source", "target"):
        assert sorted_table(f"{run_dir}/vocab/{side}").equals(sorted_table(f"{reference}/vocab/{side}"))
    out_got, out_want = sorted_table(f"{run_dir}/output"), sorted_table(f"{reference}/output")
    assert out_got.num_rows == 200
    assert out_got.select(out_want.column_names).equals(out_want)


def read_events(path: Path) -> list[dict]:
    return [json.loads(line) for line in path.read_text().splitlines()]


def test_standalone_cluster_run_equals_local_mode(workspace, runs, standalone):
    code, run_dir, log = runs["standalone"]
    assert code == 0, log[-3000:]
    assert_same_results(run_dir, runs["reference"])
    # The whole-table E-step ran two threads per task, each task claiming both cores of an executor, from
    # the second iteration on (the first, from the constant initial table, runs one thread per task).
    first, second = (json.loads(Path(run_dir, ckpt, "manifest.json").read_text())["metrics"]["forward"]
                     for ckpt in checkpoint_dirs(run_dir))
    assert first["shipping"] == second["shipping"] == "broadcast"
    assert (first["estep_threads"], second["estep_threads"]) == (1, 2)
    # Both workers ran executors of the application (their work dirs hold the executor logs).
    for work_dir in standalone["work_dirs"]:
        assert list(work_dir.glob("app-*/*/stderr")), f"no executor ran on {work_dir}"
    # run.json records how the run was launched: the file, the master, the profile.
    run_json = json.loads(Path(run_dir, "run.json").read_text())
    assert run_json["config_file"]["text"] == (workspace / "run.toml").read_text()
    assert run_json["spark"]["master"] == standalone["master"]
    assert run_json["spark"]["profile"]["name"] == "standalone"
    assert run_json["spark"]["profile"]["settings"]["spark.python.worker.reuse"] == "true"
    # One progress line per iteration on stdout, and the same figures as JSON lines.
    lines = [line for line in log.splitlines() if line.startswith("[stage ")]
    assert [line.split("]")[0] for line in lines] == ["[stage 1 ibm1 1/1", "[stage 2 hmm 1/1"]
    events = read_events(workspace / "standalone.jsonl")
    assert [e["event"] for e in events] == ["start", "iteration", "iteration", "done"]
    assert events[0]["master"] == standalone["master"] and events[-1]["rows"] == 200
    for event, rel in zip(events[1:3], checkpoint_dirs(run_dir)):
        manifest = json.loads(Path(run_dir, rel, "manifest.json").read_text())
        assert event["checkpoint"] == f"file://{run_dir}/{rel}"
        assert event["metrics"]["forward"]["loglik"] == manifest["metrics"]["forward"]["loglik"]
        assert f"loglik/word {event['metrics']['reverse']['loglik_per_word']:.4f}" in "\n".join(lines)


def test_local_cluster_run_equals_local_mode(workspace, runs):
    code, run_dir, log = runs["local-cluster"]
    assert code == 0, log[-3000:]
    assert_same_results(run_dir, runs["reference"])
    assert json.loads(Path(run_dir, "run.json").read_text())["spark"]["master"] == "local-cluster[2,1,1024]"
    hmm = json.loads(Path(run_dir, checkpoint_dirs(run_dir)[1], "manifest.json").read_text())
    assert hmm["metrics"]["forward"]["shipping"] == "join"  # the first iteration's uniform start is a constant
    assert not Path(run_dir, "decoded").exists()


def test_configuration_error_under_spark_submit_is_one_line_and_exit_2(workspace, bare_py, package_zip):
    code, run_dir, log = submit(workspace, bare_py, package_zip, "local[1]", "bad-profile", "--profile", "nope")
    assert code == 2, log[-2000:]
    errors = [line for line in log.splitlines() if line.startswith("spark-align: error:")]
    assert len(errors) == 1 and "--profile nope: no such profile" in errors[0]
    assert "Traceback" not in log
    assert not os.path.exists(run_dir)
    assert [e["event"] for e in read_events(workspace / "bad-profile.jsonl")] == ["error"]


@pytest.fixture(scope="module", autouse=True)
def _keep_logs_small(workspace):
    yield
    # Executor logs and shuffle files of the runs are not needed after the module.
    for name in ("standalone", "local-cluster", "reference"):
        shutil.rmtree(workspace / name, ignore_errors=True)
