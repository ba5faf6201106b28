"""Real faults: a training process SIGKILLed at named points, then resumed; E-step tasks that fail once.

Each run is a separate ``python -m spark_align.cli train`` process with its own
JVM (``tests/resilience/proc.py``), killed through the test-only switch
``SPARK_ALIGN_TEST_KILL_AT`` (``spark_align/engine/faults.py``). After every
kill the test checks what is on disk (nothing uncommitted looks committed) and
that no process of the killed run survives; after the last resume the tables
of every checkpoint, their dense parameters and the output corpus must equal
those of an uninterrupted run bit for bit.

The same processes also run with ``SPARK_ALIGN_TEST_FAIL_ESTEP_ONCE`` and
``--master local[2,4]``: in every E-step the first attempt of some tasks raises
and Spark retries it, so the final comparison also proves that retried tasks
change nothing (both in one chain keeps the JVM start-ups, and the test time,
down).
"""
from __future__ import annotations

import glob
import json
import os

import pytest

from spark_align.config import RunConfig
from spark_align.engine.run import train
from tests.engine.helpers import TOY_SOURCE, TOY_TARGET, write_text
from tests.resilience.proc import FAST_CONF, lex_table, output_table, run_train

pytestmark = [pytest.mark.spark, pytest.mark.slow]

SOURCE = TOY_SOURCE + ["ein buch ist klein", "das buch ist gross"]
TARGET = TOY_TARGET + ["a book is small", "the book is big"]
STAGES = "ibm1:2,hmm:1"
CHECKPOINTS = [("00-ibm1", 1), ("00-ibm1", 2), ("01-hmm", 1)]


def train_args(corpus_dir, run_dir) -> list[str]:
    return ["--source-text", str(corpus_dir / "c.src"), "--target-text", str(corpus_dir / "c.tgt"),
            "--run", str(run_dir), "--stages", STAGES, "--block-size", "4"]


@pytest.fixture(scope="module")
def corpus_dir(tmp_path_factory):
    path = tmp_path_factory.mktemp("kill-corpus")
    write_text(path, SOURCE * 3, TARGET * 3)
    return path


@pytest.fixture(scope="module")
def reference(spark, tmp_path_factory):
    """The uninterrupted run, in this process (the shared session: local[2], 4 shuffle partitions).

    It is trained with the configuration the first subprocess wrote to its ``run.json``, so both
    sides certainly train the same thing however the command line maps to a configuration.
    """
    done = {}

    def get(run_dir):
        if "dir" not in done:
            with open(os.path.join(run_dir, "run.json")) as fh:
                cfg = RunConfig.from_dict(json.load(fh)["config"])
            done["dir"] = tmp_path_factory.mktemp("kill-reference") / "run"
            train(spark, cfg, str(done["dir"]), log=lambda _: None)
        return done["dir"]

    return get


def manifest(run_dir, stage_dir, iteration) -> dict | None:
    path = os.path.join(run_dir, "checkpoints", stage_dir, f"iter-{iteration:04d}", "manifest.json")
    if not os.path.exists(path):
        return None
    with open(path) as fh:
        return json.load(fh)


def assert_same_results(run_dir, reference) -> None:
    for stage_dir, iteration in CHECKPOINTS:
        got, want = lex_table(str(run_dir), stage_dir, iteration), lex_table(str(reference), stage_dir, iteration)
        assert got.equals(want), f"{stage_dir} iteration {iteration}: tables differ"
        m_got, m_want = manifest(run_dir, stage_dir, iteration), manifest(reference, stage_dir, iteration)
        assert m_got["dense"] == m_want["dense"]
        for d in ("forward", "reverse"):
            assert m_got["metrics"][d]["loglik"] == m_want["metrics"][d]["loglik"]
    got, want = output_table(str(run_dir)), output_table(str(reference))
    assert got.column_names == want.column_names
    assert got.equals(want), "output corpora differ"


def assert_killed(result, point: str, kill_log) -> None:
    assert result.returncode == -9, (result.returncode, result.stderr[-3000:])
    said = kill_log.read_text() if kill_log.exists() else ""
    assert f"test kill (SPARK_ALIGN_TEST_KILL_AT): {point}" in said, (said, result.stderr[-3000:])
    assert result.strays == [], f"processes of the killed run survived: {result.strays}"


def test_killed_at_each_point_with_failing_tasks_then_resumed_equals_uninterrupted_run(reference, corpus_dir,
                                                                                        tmp_path):
    run_dir = tmp_path / "run"
    # local[2,4]: two cores, and a task may fail up to 4 times (local mode does not retry otherwise).
    args = train_args(corpus_dir, run_dir) + ["--master", "local[2,4]", *FAST_CONF]
    ckpt = run_dir / "checkpoints"
    n_failed = []
    kill_log = tmp_path / "kills.log"

    def run_train_step(extra, kill_at=None):
        # SPARK_ALIGN_TEST_FAIL_ESTEP_ONCE: in every E-step of every process, the first attempt of the task of
        # partition 0 (and of every even partition) raises once and Spark retries it.
        markers = tmp_path / f"markers-{len(n_failed)}"
        markers.mkdir()
        env = {"SPARK_ALIGN_TEST_FAIL_ESTEP_ONCE": str(markers)}
        if kill_at:
            env["SPARK_ALIGN_TEST_KILL_AT"] = kill_at
            env["SPARK_ALIGN_TEST_KILL_LOG"] = str(kill_log)
        result = run_train(args + extra, env=env)
        n_failed.append(len(os.listdir(markers)))
        return result

    # 1. Inside an E-step task of ibm1 iteration 2 (the task kills the driver's process group).
    r = run_train_step([], "estep:ibm1:2")
    assert_killed(r, "estep:ibm1:2 in task", kill_log)
    assert manifest(run_dir, "00-ibm1", 1) is not None
    assert manifest(run_dir, "00-ibm1", 2) is None
    assert not (run_dir / "output.json").exists()

    # 2. While hmm iteration 1 writes its table: ibm1:2 is redone, the table is left half-written.
    r = run_train_step(["--resume"], "mstep-write:hmm:1")
    assert "ingesting" not in r.stdout  # the encoded corpus was committed before the first kill
    assert "resuming after checkpoint ibm1:1" in r.stdout
    assert "injected E-step failure" in r.stderr  # Spark logs the lost task it retried
    assert_killed(r, "mstep-write:hmm:1 while files are being written", kill_log)
    assert (ckpt / "01-hmm" / "iter-0001" / "lex" / "_temporary").exists()
    assert manifest(run_dir, "01-hmm", 1) is None

    # 3. Halfway through hmm iteration 1's manifest: a truncated temporary file stays behind.
    r = run_train_step(["--resume"], "manifest:hmm:1")
    assert "note: ignoring checkpoints/01-hmm/iter-0001: no manifest.json" in r.stdout
    assert "resuming after checkpoint ibm1:2" in r.stdout
    assert_killed(r, "manifest:hmm:1 with", kill_log)
    leftovers = glob.glob(str(ckpt / "01-hmm" / "iter-0001" / "manifest.json.tmp-*"))
    assert len(leftovers) == 1 and manifest(run_dir, "01-hmm", 1) is None
    with pytest.raises(json.JSONDecodeError):
        json.load(open(leftovers[0]))

    # 4. While the output corpus is written: readers must ignore the temporary file, redo hmm:1, decode.
    r = run_train_step(["--resume"], "output-write:hmm:1")
    assert "note: ignoring checkpoints/01-hmm/iter-0001: no manifest.json" in r.stdout
    assert "resuming after checkpoint ibm1:2" in r.stdout and "[stage 2 hmm 1/1]" in r.stdout
    assert_killed(r, "output-write:hmm:1 while files are being written", kill_log)
    assert manifest(run_dir, "01-hmm", 1) is not None
    assert (run_dir / "output" / "_temporary").exists() and not (run_dir / "output.json").exists()

    # 5. Halfway through output.json: the output files are all there, but nothing says they are complete.
    r = run_train_step(["--resume"], "output-commit")
    assert "resuming after checkpoint hmm:1" in r.stdout and "[stage" not in r.stdout
    assert_killed(r, "output-commit:hmm:1 with", kill_log)
    assert not (run_dir / "output.json").exists() and not (run_dir / "output" / "_temporary").exists()
    assert len(glob.glob(str(run_dir / "output.json.tmp-*"))) == 1

    # 6. The last resume only decodes: training is complete.
    r = run_train_step(["--resume"])
    assert r.returncode == 0, r.stderr[-3000:]
    assert r.strays == []
    assert "resuming after checkpoint hmm:1" in r.stdout and "[stage" not in r.stdout
    assert json.load(open(run_dir / "output.json"))["rows"] == len(SOURCE) * 3
    # Steps 1 to 4 ran E-steps (each had tasks fail once and be retried); steps 5 and 6 only decode.
    assert all(n > 0 for n in n_failed[:4]) and n_failed[4:] == [0, 0], n_failed
    assert_same_results(run_dir, reference(run_dir))
