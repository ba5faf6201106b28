"""Bad input gets one line on stderr, exit code 2, no traceback, and nothing written."""
from __future__ import annotations

import os

import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from spark_align.cli import main
from tests.engine.helpers import TOY_SOURCE, TOY_TARGET, write_text

pytestmark = pytest.mark.spark


def run_cli(capsys, *args):
    code = main(["train", *args, "--master", "local[2]"])
    err = capsys.readouterr().err.strip()
    return code, err


def assert_one_line_error(code, err, *needles):
    assert code == 2, err
    lines = [x for x in err.splitlines() if x.startswith("spark-align")]
    assert len(lines) == 1, err
    assert "Traceback" not in err
    for needle in needles:
        assert needle in lines[0], lines[0]


def test_line_counts_differ(spark, tmp_path, capsys):
    s, t = write_text(tmp_path, TOY_SOURCE, TOY_TARGET[:-1])
    run = tmp_path / "run"
    code, err = run_cli(capsys, "--source-text", s, "--target-text", t, "--run", str(run))
    assert_one_line_error(code, err, "has 5 lines", "has 4")
    assert not run.exists()


def test_invalid_utf8_names_the_line(spark, tmp_path, capsys):
    s, t = write_text(tmp_path, TOY_SOURCE, TOY_TARGET)
    with open(t, "ab") as fh:
        fh.write(b"ok line\n")
    with open(s, "ab") as fh:
        fh.write(b"bad \xff\xfe byte\n")
    run = tmp_path / "run"
    code, err = run_cli(capsys, "--source-text", s, "--target-text", t, "--run", str(run))
    assert_one_line_error(code, err, "line 6", "invalid UTF-8")
    assert not run.exists()


@pytest.mark.parametrize("table, args, needles", [
    (pa.table({"src": ["a"], "target": ["b"]}), [], ["no source column 'source'", "--source-column"]),
    (pa.table({"source": [1, 2], "target": ["a", "b"]}), [], ["source column 'source' has type bigint"]),
    (pa.table({"source": ["a b", None, "c"], "target": ["x", "y", "z"]}), [], ["row 1", "null in column 'source'"]),
    (pa.table({"source": pa.array([], pa.string()), "target": pa.array([], pa.string())}), [], ["empty"]),
    (pa.table({"source": ["a"], "target": ["b"]}), ["--id-column", "doc"], ["no id column 'doc'"]),
    (pa.table({"source": ["a"], "target": ["b"], "alignment": ["0-0"]}), [], ["column 'alignment' is reserved"]),
])
def test_bad_parquet_corpus(spark, tmp_path, capsys, table, args, needles):
    pq.write_table(table, tmp_path / "c.parquet")
    run = tmp_path / "run"
    code, err = run_cli(capsys, "--corpus", str(tmp_path / "c.parquet"), "--run", str(run), *args)
    assert_one_line_error(code, err, *needles)
    assert not run.exists()


def test_missing_corpus_path(spark, tmp_path, capsys):
    code, err = run_cli(capsys, "--corpus", str(tmp_path / "nope"), "--run", str(tmp_path / "run"))
    assert_one_line_error(code, err, "no such file or directory")
    assert not (tmp_path / "run").exists()


def test_all_rows_filtered(spark, tmp_path, capsys):
    s, t = write_text(tmp_path, ["", "a"], ["x", ""])
    code, err = run_cli(capsys, "--source-text", s, "--target-text", t, "--run", str(tmp_path / "run"))
    assert_one_line_error(code, err, "no pair can be trained on", "empty_source: 1", "empty_target: 1")


def test_bad_stages_and_options(spark, tmp_path, capsys):
    s, t = write_text(tmp_path, TOY_SOURCE, TOY_TARGET)
    for bad, needle in ((["--stages", "ibm9:3"], "unknown model 'ibm9'"), (["--stages", "ibm1"], "NAME:ITERATIONS"),
                        (["--max-length", "0"], "max_length"), (["--conf", "nonsense"], "KEY=VALUE")):
        code, err = run_cli(capsys, "--source-text", s, "--target-text", t, "--run", str(tmp_path / "r"), *bad)
        assert_one_line_error(code, err, needle)
    assert not (tmp_path / "r").exists()


def test_run_dir_of_another_run_is_refused(spark, tmp_path, capsys):
    s, t = write_text(tmp_path, TOY_SOURCE, TOY_TARGET)
    run = str(tmp_path / "run")
    assert run_cli(capsys, "--source-text", s, "--target-text", t, "--run", run, "--stages", "ibm1:1")[0] == 0
    code, err = run_cli(capsys, "--source-text", s, "--target-text", t, "--run", run, "--stages", "ibm1:1")
    assert_one_line_error(code, err, "already holds a run", "--resume")
    s2, t2 = write_text(tmp_path, TOY_SOURCE[::-1], TOY_TARGET[::-1], name="other")
    code, err = run_cli(capsys, "--source-text", s2, "--target-text", t2, "--run", run, "--resume")
    assert_one_line_error(code, err, "different corpus")
    code, err = run_cli(capsys, "--source-text", s, "--target-text", t, "--run", run, "--resume", "--lowercase")
    assert_one_line_error(code, err, "incompatible configuration", "corpus.lowercase was False, now True")


def test_unwritable_run_dir(spark, tmp_path, capsys):
    if os.geteuid() == 0:
        target = "/proc/spark-align-cannot-write-here"
    else:
        locked = tmp_path / "locked"
        locked.mkdir(mode=0o500)
        target = str(locked / "run")
    s, t = write_text(tmp_path, TOY_SOURCE, TOY_TARGET)
    code, err = run_cli(capsys, "--source-text", s, "--target-text", t, "--run", target)
    assert_one_line_error(code, err, "not writable")


def test_demo_runs_and_reports(spark, tmp_path, capsys):
    code = main(["demo", "--dir", str(tmp_path / "demo"), "--pairs", "400", "--master", "local[2]"])
    out = capsys.readouterr().out
    assert code == 0
    assert "example alignments" in out and "precision" in out
    table = pq.read_table(tmp_path / "demo" / "run" / "output")
    assert table.num_rows == 400
    assert table.column("alignment").null_count == 0
