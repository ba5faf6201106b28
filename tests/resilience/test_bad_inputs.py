"""The bad-input battery (README, "Bad input"): each row either works, saying how it was treated, or stops
with one line and exit code 2; no input row is ever lost from the output.

Rows already covered by ``tests/cli/test_bad_input.py`` (source longer than target,
invalid UTF-8 in the source file, a null source cell, an integer column, an empty
Parquet corpus, a missing Parquet path, an unwritable run directory, another
run's directory, all rows filtered out) are not repeated here; these tests add
the other rows and the other side of each.
"""
from __future__ import annotations

import json
import os

import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from spark_align.cli import main
from spark_align.config import CorpusConfig
from spark_align.engine.run import train
from tests.engine.helpers import TOY_SOURCE, TOY_TARGET, config, read_output, write_text

pytestmark = pytest.mark.spark

LONG_LINE = " ".join(f"w{i}" for i in range(50_000))

# (source, target, skip_reason) of the text corpus that must train: awkward but valid lines.
AWKWARD = [
    ("das haus", "the house", None),
    ("", "the book", "empty_source"),                                   # blank line
    ("ein buch", "  \t \u3000 ", "empty_target"),                       # only (Unicode) whitespace
    ("foo\u200bbar e\u0301 \u00e9", "zw\u200cnj x\u200dy ok", None),    # zero-width and combining characters
    ("\u05e9\u05dc\u05d5\u05dd \u05e2\u05d5\u05dc\u05dd\u200f",         # right-to-left text with a RLM mark
     "\u0645\u0631\u062d\u0628\u0627 \u0628\u0627\u0644\u0639\u0627\u0644\u0645", None),
    ("a\u2028b c\x85d", "p q r s", None),                              # Unicode line separators inside a line
    (LONG_LINE, "a very long line", "too_long"),                        # 50,000 tokens
    ("ein haus", "a house", None),
]


def write_bytes(path, lines: list[str], *, bom=False, crlf=False, final_newline=True) -> str:
    ending = "\r\n" if crlf else "\n"
    text = ending.join(lines) + (ending if final_newline else "")
    path.write_bytes((b"\xef\xbb\xbf" if bom else b"") + text.encode("utf-8"))
    return str(path)


def test_awkward_text_trains_and_every_line_round_trips_unchanged(spark, tmp_path):
    """CRLF endings, a BOM, no final newline, blank/whitespace lines, zero-width, combining and RTL text,
    line separators inside a line and a 50,000-token line: all train, and nothing is lost or altered."""
    rows = [(s, t, None) for s, t in zip(TOY_SOURCE, TOY_TARGET)] + AWKWARD
    src = write_bytes(tmp_path / "c.src", [r[0] for r in rows], bom=True, crlf=True, final_newline=False)
    tgt = write_bytes(tmp_path / "c.tgt", [r[1] for r in rows], crlf=True)
    run_dir = str(tmp_path / "run")
    lines: list[str] = []
    train(spark, config(CorpusConfig(source_text=src, target_text=tgt), "ibm1:1", directions="forward"),
          run_dir, log=lines.append)
    assert any("skipped: empty_source 1, empty_target 1, too_long 1" in x for x in lines), lines

    out = read_output(run_dir)
    assert out.num_rows == len(rows)
    assert out.column("line").to_pylist() == list(range(1, len(rows) + 1))
    # Text is stored exactly as read: no BOM, no line ending, nothing normalised.
    assert out.column("source").to_pylist() == [r[0] for r in rows]
    assert out.column("target").to_pylist() == [r[1] for r in rows]
    assert out.column("skip_reason").to_pylist() == [r[2] for r in rows]
    for row, (s, t, reason) in zip(out.to_pylist(), rows):
        if reason is not None:
            assert row["alignment"] is None
            continue
        n_src, n_tgt = len(s.split()), len(t.split())  # tokens are str.split() tokens
        assert row["alignment"], row
        assert all(0 <= k["source"] < n_src and 0 <= k["target"] < n_tgt for k in row["alignment"])

    vocab = set(pq.read_table(os.path.join(run_dir, "vocab", "source")).column("word").to_pylist())
    assert {"das", "foo\u200bbar", "e\u0301", "\u00e9", "\u05e2\u05d5\u05dc\u05dd\u200f", "a", "b", "c", "d"} <= vocab
    assert not any(w.startswith("\ufeff") or w.endswith("\r") for w in vocab)
    assert "w0" not in vocab  # the skipped long line was never encoded
    summary = json.load(open(os.path.join(run_dir, "output.json")))
    assert summary["rows"] == len(rows) and summary["skipped"] == 3


def test_duplicate_and_null_ids_are_carried_not_merged(spark, tmp_path):
    table = pa.table({
        "doc": pa.array([7, 7, 8, None, 8], pa.int64()),
        "source": ["das haus", "das haus", "das buch", "ein buch", "ein haus"],
        "target": ["the house", "the house", "the book", "a book", "a house"],
        "when": pa.array([1, 2, 3, 4, 5], pa.timestamp("s")),
        "tags": [["x"], [], None, ["y", "z"], ["w"]],
    })
    pq.write_table(table, tmp_path / "c.parquet")
    run_dir = str(tmp_path / "run")
    lines: list[str] = []
    train(spark, config(CorpusConfig(path=str(tmp_path / "c.parquet"), id_column="doc"), "ibm1:1",
                        directions="forward"), run_dir, log=lines.append)
    assert any("warning: 2 row(s) repeat a value of id column 'doc'" in x for x in lines), lines
    out = read_output(run_dir)
    for name in ("doc", "source", "target", "when", "tags"):
        assert out.column(name).to_pylist() == table.column(name).to_pylist(), name
    assert out.column("alignment").null_count == 0
    assert json.load(open(os.path.join(run_dir, "encoded.json")))["duplicate_ids"] == 2


def test_a_single_pair_trains(spark, tmp_path):
    s, t = write_text(tmp_path, ["haus"], ["house"])
    run_dir = str(tmp_path / "run")
    # A run killed while claiming its directory leaves only a temporary run.json: the directory is still free.
    os.makedirs(run_dir)
    with open(os.path.join(run_dir, "run.json.tmp-0123abcd"), "w") as fh:
        fh.write('{"config": {"corp')
    train(spark, config(CorpusConfig(source_text=s, target_text=t), "ibm1:2", directions="both"), run_dir,
          log=lambda _: None)
    out = read_output(run_dir)
    assert out.num_rows == 1
    assert [(k["source"], k["target"]) for k in out.column("alignment")[0].as_py()] == [(0, 0)]


# -- rows that stop with one line and exit code 2 ---------------------------------------------------
def run_cli(capsys, *args):
    code = main(["train", *args, "--stages", "ibm1:1", "--master", "local[2]"])
    return code, capsys.readouterr().err.strip()


def assert_one_line_error(code, err, *needles) -> None:
    assert code == 2, err
    lines = [x for x in err.splitlines() if x.startswith("spark-align")]
    assert len(lines) == 1 and "Traceback" not in err, err
    for needle in needles:
        assert needle in lines[0], lines[0]


def text_case(tmp_path, src_lines, tgt_lines):
    s = write_bytes(tmp_path / "c.src", src_lines)
    t = write_bytes(tmp_path / "c.tgt", tgt_lines)
    return ["--source-text", s, "--target-text", t]


def test_target_with_more_lines_names_both_counts(spark, tmp_path, capsys):
    args = text_case(tmp_path, ["a", "b"], ["x", "y", "z"])
    assert_one_line_error(*run_cli(capsys, *args, "--run", str(tmp_path / "run")), "has 2 lines", "has 3")
    assert not (tmp_path / "run").exists()


def test_latin1_target_file_names_file_and_line(spark, tmp_path, capsys):
    s = write_bytes(tmp_path / "c.src", ["cafe noir", "the"])
    (tmp_path / "c.tgt").write_bytes("caf\u00e9 noir\nle\n".encode("latin-1"))
    code, err = run_cli(capsys, "--source-text", s, "--target-text", str(tmp_path / "c.tgt"),
                        "--run", str(tmp_path / "run"))
    assert_one_line_error(code, err, "c.tgt line 1: invalid UTF-8 at byte 3")
    assert not (tmp_path / "run").exists()


def test_empty_text_files(spark, tmp_path, capsys):
    (tmp_path / "c.src").write_bytes(b"")
    (tmp_path / "c.tgt").write_bytes(b"")
    code, err = run_cli(capsys, "--source-text", str(tmp_path / "c.src"), "--target-text", str(tmp_path / "c.tgt"),
                        "--run", str(tmp_path / "run"))
    assert_one_line_error(code, err, "the corpus is empty")
    assert not (tmp_path / "run").exists()


def test_missing_text_file(spark, tmp_path, capsys):
    s = write_bytes(tmp_path / "c.src", ["a"])
    code, err = run_cli(capsys, "--source-text", s, "--target-text", str(tmp_path / "nope.tgt"),
                        "--run", str(tmp_path / "run"))
    assert_one_line_error(code, err, "nope.tgt: no such file")
    assert not (tmp_path / "run").exists()


def test_only_whitespace_everywhere_stops_and_leaves_no_run_behind(spark, tmp_path, capsys):
    args = text_case(tmp_path, [" ", "\t"], ["\u3000", "  "])
    code, err = run_cli(capsys, *args, "--run", str(tmp_path / "run"))
    assert_one_line_error(code, err, "no pair can be trained on: all 2 rows were filtered out", "empty_source: 2")
    assert not (tmp_path / "run").exists()  # the half-made run directory is removed again


def invalid_utf8_strings(values: list[bytes]) -> pa.Array:
    raw = pa.array(values, pa.binary())
    return pa.Array.from_buffers(pa.string(), len(raw), raw.buffers())  # bypasses Arrow's UTF-8 check


@pytest.mark.parametrize("table, needles", [
    (pa.table({"source": ["a b", "c", "d"], "target": invalid_utf8_strings([b"x", b"y", b"z\xff"])}),
     ["row 2: invalid UTF-8 in column 'target'", "1 row(s)"]),
    (pa.table({"source": ["a b", "c"], "target": ["x", None]}), ["row 1: null in column 'target'"]),
    (pa.table({"source": ["a"], "target": pa.array([b"x"], pa.binary())}),
     ["target column 'target' has type binary, expected string"]),
    (pa.table({"source": [["a", "b"]], "target": ["x"]}), ["source column 'source' has type array<string>"]),
])
def test_bad_parquet_cells_and_types(spark, tmp_path, capsys, table, needles):
    pq.write_table(table, tmp_path / "c.parquet")
    code, err = run_cli(capsys, "--corpus", str(tmp_path / "c.parquet"), "--run", str(tmp_path / "run"))
    assert_one_line_error(code, err, "c.parquet", *needles)
    assert not (tmp_path / "run").exists()


def test_parquet_directory_without_files(spark, tmp_path, capsys):
    (tmp_path / "corpus").mkdir()
    code, err = run_cli(capsys, "--corpus", str(tmp_path / "corpus"), "--run", str(tmp_path / "run"))
    assert_one_line_error(code, err, "no Parquet data found")


def test_run_dir_that_is_not_a_run(spark, tmp_path, capsys):
    args = text_case(tmp_path, TOY_SOURCE, TOY_TARGET)
    other = tmp_path / "other"
    other.mkdir()
    (other / "notes.txt").write_text("someone else's files")
    assert_one_line_error(*run_cli(capsys, *args, "--run", str(other)), "is not empty and holds no run")
    assert os.listdir(other) == ["notes.txt"]
    assert_one_line_error(*run_cli(capsys, *args, "--run", str(other), "--resume"), "is not empty and holds no run")
    (other / "corpus").mkdir()  # looks like a run directory that lost its run.json
    assert_one_line_error(*run_cli(capsys, *args, "--run", str(other), "--resume"),
                          "has no run.json: it is not a spark_align run directory")
    assert sorted(os.listdir(other)) == ["corpus", "notes.txt"]
