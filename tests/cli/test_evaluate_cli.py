"""``spark-align evaluate``: good input (figures worked by hand), keys, and bad gold files.

No Spark: predicted files are written here in the output corpus's layout with pyarrow.
"""
from __future__ import annotations

import json
import subprocess
import sys

import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from spark_align.cli import main

LINK = pa.struct([("source", pa.int32()), ("target", pa.int32()), ("posterior", pa.float64())])
GOLD_LINK = pa.struct([("source", pa.int32()), ("target", pa.int32())])


def links(pairs, with_posterior=True):
    if pairs is None:
        return None
    return [{"source": i, "target": j, **({"posterior": 0.9} if with_posterior else {})} for i, j in pairs]


def write_output(path, *, line=True, rows=None, forward=None):
    """An output corpus like a run's: 3 pairs (2x2, 3x3, 12x1 tokens), row 2 skipped (null alignment)."""
    rows = rows or [[(0, 0), (1, 1)], [(0, 0), (1, 2), (2, 2)], None]
    forward = forward or [[(0, 0)], [(0, 0), (2, 2)], None]
    table = {
        "source": ["a b", "c d e", " ".join("x" * 12)],
        "target": ["A B", "C D E", "Y"],
        "_row": [8589934592, 8589934593, 5],  # any order: line numbers follow _row order
        "alignment": pa.array([links(r) for r in rows], pa.list_(LINK)),
        "alignment_forward": pa.array([links(r) for r in forward], pa.list_(LINK)),
    }
    if line:
        table["line"] = [1, 2, 3]
    pq.write_table(pa.table(table), path)
    return str(path)


def run(capsys, *args):
    code = main(["evaluate", *args])
    out, err = capsys.readouterr()
    return code, out, err.strip()


def assert_error(code, err, *needles):
    assert code == 2, err
    assert len(err.splitlines()) == 1 and err.startswith("spark-align: error:"), err
    for needle in needles:
        assert needle in err, err


def test_text_gold_against_run_output_worked_by_hand(tmp_path, capsys):
    pred = write_output(tmp_path / "out.parquet")
    gold = tmp_path / "gold.txt"
    gold.write_text("0-0 1-1\n0-0 1-1 2?2\n\n", encoding="utf-8")
    code, out, _ = run(capsys, "--predicted", pred, "--gold", str(gold), "--json")
    assert code == 0
    report = json.loads(out)
    # By hand: line 1: A={00,11}, S={00,11}: 2 predicted, 2 sure, 2 hit both.
    # line 2: A={00,12,22}, S={00,11}, P=S+{22}: |A|=3, |S|=2, |A∩S|=1, |A∩P|=2.
    # Totals: |A|=5, |S|=4, |A∩S|=3, |A∩P|=4 -> P=4/5, R=3/4, AER=1-7/9, F1=2*.8*.75/1.55.
    o = report["overall"]
    assert (o["n_sentences"], o["n_predicted"], o["n_sure"]) == (2, 5, 4)
    assert o["precision"] == pytest.approx(0.8) and o["recall"] == pytest.approx(0.75)
    assert o["aer"] == pytest.approx(1 - 7 / 9) and o["f1"] == pytest.approx(2 * 0.8 * 0.75 / 1.55)
    # line 3 was skipped by the aligner (null alignment): reported, not silently dropped
    assert report["missing"] == {"count": 1, "first": [3]}
    assert [b["bucket"] for b in report["buckets"]] == ["<=10"]


def test_table_report_and_other_columns(tmp_path, capsys):
    pred = write_output(tmp_path / "out.parquet")
    gold = tmp_path / "gold.txt"
    gold.write_text("0-0 1-1\n0-0 1-1 2?2\n0-0\n4-0\n", encoding="utf-8")  # line 4: no such prediction
    code, out, _ = run(capsys, "--predicted", pred, "--gold", str(gold), "--alignment-column", "alignment_forward")
    assert code == 0
    assert "gold rows without a prediction: 2 (not scored; first: 3, 4)" in out
    assert "column alignment_forward" in out
    # forward: A = {00} and {00,22}: |A|=3, |A∩S|=2, |A∩P|=3 -> precision 1, recall 0.5
    all_row = next(x for x in out.splitlines() if x.startswith("all "))
    assert all_row.split()[1:5] == ["2", "1.0000", "0.5000", "0.6667"]


def test_row_order_keys_and_parquet_gold(tmp_path, capsys):
    # No 'line' column: a text gold's line N is the N-th row in _row order (row with _row 5 is line 1).
    pred = write_output(tmp_path / "out.parquet", line=False,
                        rows=[[(0, 0)], [(1, 1)], [(0, 0), (5, 0)]])
    gold = tmp_path / "gold.txt"
    gold.write_text("0-0 5-0\n0-0\n1-1\n", encoding="utf-8")
    code, out, _ = run(capsys, "--predicted", pred, "--gold", str(gold), "--json")
    assert json.loads(out)["overall"]["aer"] == pytest.approx(0.0)
    # Parquet gold keyed by another column name, matched to the predicted _row values
    gp = tmp_path / "gold.parquet"
    pq.write_table(pa.table({"rid": [5, 8589934592], "sure": pa.array([[{"source": 0, "target": 0}], []],
                                                                        pa.list_(GOLD_LINK)),
                             "possible": pa.array([[], [{"source": 0, "target": 0}]], pa.list_(GOLD_LINK))}), gp)
    code, out, _ = run(capsys, "--predicted", pred, "--gold", str(gp), "--gold-id-column", "rid", "--json")
    report = json.loads(out)
    # _row 5: A={00,50}, S={00} -> |A|=2,|S|=1,hits 1/1 ; _row 2^33: A={00}, S={}, P={00} -> |A|=1, |A∩P|=1
    assert report["overall"]["precision"] == pytest.approx(2 / 3)
    assert report["overall"]["recall"] == pytest.approx(1.0)
    assert report["extra"]["count"] == 1  # _row 2^33+1 has a prediction but no gold


def test_mismatched_keys_give_a_hint(tmp_path, capsys):
    pred = write_output(tmp_path / "out.parquet")
    gp = tmp_path / "gold.parquet"
    pq.write_table(pa.table({"line": ["1", "2"], "sure": pa.array([[], []], pa.list_(GOLD_LINK)),
                             "possible": pa.array([[], []], pa.list_(GOLD_LINK))}), gp)
    code, out, _ = run(capsys, "--predicted", pred, "--gold", str(gp))
    assert code == 0
    assert "warning: no row key is on both sides" in out and "'1'" in out


@pytest.mark.parametrize("gold_text, needles", [
    ("0-0 1-1\n0-0 0-0\n", ["gold.txt: line 2", "listed twice"]),
    ("0-0 1-1\n0-0 0?0\n", ["line 2", "both sure and possible"]),
    ("0-0 1-1\n0-0 3-1\n", ["line 2", "'3-1' is outside the sentence pair (3 source x 3 target tokens)"]),
    ("0-0 1-1\n0-0 1:1\n", ["line 2", "malformed link '1:1'"]),
])
def test_bad_gold_text_names_the_line(tmp_path, capsys, gold_text, needles):
    pred = write_output(tmp_path / "out.parquet")
    gold = tmp_path / "gold.txt"
    gold.write_text(gold_text, encoding="utf-8")
    assert_error(*run(capsys, "--predicted", pred, "--gold", str(gold))[::2], *needles)


def test_missing_and_bad_parquet_gold_name_the_row(tmp_path, capsys):
    pred = write_output(tmp_path / "out.parquet")
    assert_error(*run(capsys, "--predicted", pred, "--gold", str(tmp_path / "nope.txt"))[::2],
                 "nope.txt", "no such file")
    gp = tmp_path / "gold.parquet"
    pq.write_table(pa.table({"line": [1, 2], "sure": pa.array([[], [{"source": 0, "target": 9}]], pa.list_(GOLD_LINK)),
                             "possible": pa.array([[], []], pa.list_(GOLD_LINK))}), gp)
    assert_error(*run(capsys, "--predicted", pred, "--gold", str(gp))[::2], "row 2", "0-9 is outside")
    pq.write_table(pa.table({"line": [1, 1], "sure": pa.array([[], []], pa.list_(GOLD_LINK)),
                             "possible": pa.array([[], []], pa.list_(GOLD_LINK))}), gp)
    assert_error(*run(capsys, "--predicted", pred, "--gold", str(gp))[::2], "key 1 appears in more than one row")
    assert_error(*run(capsys, "--predicted", pred, "--gold", str(gp), "--alignment-column", "alignment_reverse")[::2],
                 "no column 'alignment_reverse'")


def test_text_prediction_with_corpus_lengths(tmp_path, capsys):
    src, tgt = tmp_path / "c.src", tmp_path / "c.tgt"
    src.write_text("a b\nc d e f\n", encoding="utf-8")
    tgt.write_text("A B\nC D\n", encoding="utf-8")
    pred, gold = tmp_path / "pred.txt", tmp_path / "gold.txt"
    pred.write_text("0-0 1-1\n3-1\n", encoding="utf-8")
    gold.write_text("0-0 1-1\n3-1 0?0\n", encoding="utf-8")
    code, out, _ = run(capsys, "--predicted", str(pred), "--gold", str(gold), "--source-text", str(src),
                       "--target-text", str(tgt), "--buckets", "2", "--json")
    report = json.loads(out)
    assert report["overall"]["aer"] == pytest.approx(0.0)
    assert [(b["bucket"], b["n_sentences"]) for b in report["buckets"]] == [("<=2", 1), ("3+", 1)]
    pred.write_text("0-0 1-1\n3-2\n", encoding="utf-8")
    assert_error(*run(capsys, "--predicted", str(pred), "--gold", str(gold), "--source-text", str(src),
                      "--target-text", str(tgt))[::2], "pred.txt: line 2", "outside the sentence pair")


def test_evaluate_never_starts_spark(tmp_path):
    pred = write_output(tmp_path / "out.parquet")
    gold = tmp_path / "gold.txt"
    gold.write_text("0-0\n", encoding="utf-8")
    code = ("import sys; from spark_align.cli import main; rc = main(['evaluate', '--predicted', sys.argv[1], "
            "'--gold', sys.argv[2]]); assert 'pyspark' not in sys.modules, 'pyspark imported'; sys.exit(rc)")
    done = subprocess.run([sys.executable, "-c", code, pred, str(gold)], capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stderr
    assert "rows scored: 1" in done.stdout
