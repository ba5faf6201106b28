"""Alignment metrics, gold/prediction readers and the report (hand-computed cases).

The comparison with NLTK lives in tests/reference/test_nltk_metrics.py.
"""
import math

import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from spark_align.errors import InputError
from spark_align.evaluate import (
    GoldAlignment,
    evaluate,
    format_report,
    metrics_from_counts,
    read_gold_parquet,
    read_gold_text,
    read_lengths_parquet,
    read_links_parquet,
    read_links_text,
    sentence_counts,
)

# S = {0-0, 1-1}, possible-only {2?1}, so P = {0-0, 1-1, 2-1}; A = {0-0, 2-1, 2-2}.
GOLD_1 = GoldAlignment(frozenset({(0, 0), (1, 1)}), frozenset({(2, 1)}))
PRED_1 = {(0, 0), (2, 1), (2, 2)}


def test_hand_computed_single_sentence():
    counts = sentence_counts(PRED_1, GOLD_1)
    # |A| = 3, |S| = 2, |P| = 3, |A∩S| = |{0-0}| = 1, |A∩P| = |{0-0, 2-1}| = 2
    assert counts == {"n_sentences": 1, "n_predicted": 3, "n_sure": 2, "n_possible": 3,
                      "n_predicted_sure": 1, "n_predicted_possible": 2}
    m = metrics_from_counts(counts)
    assert m["precision"] == pytest.approx(2 / 3)      # |A∩P| / |A|
    assert m["recall"] == pytest.approx(1 / 2)         # |A∩S| / |S|
    assert m["aer"] == pytest.approx(1 - 3 / 5)        # 1 - (1 + 2) / (3 + 2)
    assert m["f1"] == pytest.approx(4 / 7)             # 2 (2/3)(1/2) / (2/3 + 1/2)


def test_possible_always_includes_sure():
    gold = GoldAlignment(frozenset({(0, 0)}), frozenset())
    assert gold.possible == {(0, 0)}
    # A = S exactly: perfect scores.
    m = metrics_from_counts(sentence_counts({(0, 0)}, gold))
    assert (m["precision"], m["recall"], m["f1"], m["aer"]) == (1.0, 1.0, 1.0, 0.0)


def test_corpus_figures_are_micro_averaged():
    gold = {1: GOLD_1, 2: GoldAlignment(frozenset({(0, 0)}), frozenset())}
    report = evaluate({1: PRED_1, 2: set()}, gold)
    overall = report["overall"]
    # Sums: |A| = 3 + 0, |S| = 2 + 1, |A∩S| = 1 + 0, |A∩P| = 2 + 0.
    assert overall["n_sentences"] == 2
    assert overall["precision"] == pytest.approx(2 / 3)
    assert overall["recall"] == pytest.approx(1 / 3)   # a per-sentence mean would give (1/2 + 0)/2
    assert overall["aer"] == pytest.approx(1 - 3 / 6)


def test_empty_denominators_give_nan_not_errors():
    nothing = metrics_from_counts(sentence_counts(set(), GoldAlignment(frozenset(), frozenset())))
    assert all(math.isnan(v) for v in nothing.values())
    # No prediction, some sure links: precision undefined, recall 0, AER 1 - 0/|S| = 1.
    m = metrics_from_counts(sentence_counts(set(), GoldAlignment(frozenset({(0, 0)}), frozenset())))
    assert math.isnan(m["precision"]) and m["recall"] == 0.0 and m["aer"] == 1.0 and math.isnan(m["f1"])
    # Predictions against a gold row with only possible links: recall undefined,
    # precision 1/2, AER = 1 - (0 + 1)/(2 + 0) = 0.5.
    m = metrics_from_counts(sentence_counts({(0, 0), (1, 1)}, GoldAlignment(frozenset(), frozenset({(0, 0)}))))
    assert m["precision"] == 0.5 and math.isnan(m["recall"]) and m["aer"] == 0.5 and math.isnan(m["f1"])
    # Precision and recall both 0: F1 is 0, not a division error.
    m = metrics_from_counts(sentence_counts({(1, 1)}, GoldAlignment(frozenset({(0, 0)}), frozenset())))
    assert m["f1"] == 0.0 and m["aer"] == 1.0


def test_buckets_by_source_length():
    gold = {k: GoldAlignment(frozenset({(0, 0)}), frozenset()) for k in range(1, 7)}
    pred = {1: {(0, 0)}, 2: {(0, 0)}, 3: set(), 4: {(0, 0), (1, 0)}, 5: {(0, 0)}, 6: {(0, 0)}}
    lengths = {1: (10, 3), 2: (11, 3), 3: (20, 3), 4: (40, 3), 5: (41, 3)}  # row 6 has no known length
    report = evaluate(pred, gold, lengths=lengths)
    buckets = {b["bucket"]: b for b in report["buckets"]}
    assert list(buckets) == ["<=10", "11-20", "21-40", "41+", "unknown length"]
    assert {k: b["n_sentences"] for k, b in buckets.items()} == {
        "<=10": 1, "11-20": 2, "21-40": 1, "41+": 1, "unknown length": 1}
    assert buckets["11-20"]["recall"] == 0.5          # rows 2 (hit) and 3 (miss)
    assert buckets["21-40"]["precision"] == 0.5       # row 4: 1 of 2 predicted links is sure
    custom = evaluate(pred, gold, lengths=lengths, bucket_edges=(15,))
    assert [b["bucket"] for b in custom["buckets"]] == ["<=15", "16+", "unknown length"]
    with pytest.raises(InputError, match="bucket edges must be increasing"):
        evaluate(pred, gold, bucket_edges=(20, 10))


def test_unmatched_rows_are_counted_and_listed():
    gold = {k: GOLD_1 for k in range(1, 10)}
    pred = {k: PRED_1 for k in (1, 2, 3, 20, 21)}
    report = evaluate(pred, gold, n_listed=3)
    assert report["overall"]["n_sentences"] == 3
    assert report["missing"] == {"count": 6, "first": [4, 5, 6]}
    assert report["extra"] == {"count": 2, "first": [20, 21]}
    text = format_report(report)
    assert "gold rows without a prediction: 6 (not scored; first: 4, 5, 6, ...)" in text
    assert "predicted rows not in the gold file: 2 (not scored; first: 20, 21)" in text


def test_predicted_link_outside_known_lengths_is_an_error():
    with pytest.raises(InputError, match=r"row 1: predicted link 2-1 is outside the sentence pair \(2 source x 5"):
        evaluate({1: PRED_1}, {1: GOLD_1}, lengths={1: (2, 5)})


def test_format_report_table():
    report = evaluate({1: PRED_1, 2: set()}, {1: GOLD_1, 2: GoldAlignment(frozenset(), frozenset())},
                      lengths={1: (3, 3), 2: (12, 2)})
    lines = format_report(report).splitlines()
    assert lines[0] == "rows scored: 2 (predicted links 3, sure 2, possible incl. sure 3)"
    table = {line.split()[0]: line.split()[1:] for line in lines[3:]}
    assert table["all"] == ["2", "0.6667", "0.5000", "0.5714", "0.4000"]
    assert table["<=10"] == ["1", "0.6667", "0.5000", "0.5714", "0.4000"]
    assert table["11-20"] == ["1", "n/a", "n/a", "n/a", "n/a"]


# ---------------------------------------------------------------------------
# Text files
# ---------------------------------------------------------------------------

def write(tmp_path, text, name="gold.txt"):
    path = tmp_path / name
    path.write_bytes(text.encode("utf-8") if isinstance(text, str) else text)
    return path


def test_read_gold_text(tmp_path):
    path = write(tmp_path, "0-0 1-1 2?1\n\n0?0\r\n")
    gold = read_gold_text(path, lengths=[(3, 2), (1, 1), (1, 1)])
    assert list(gold) == [1, 2, 3]
    assert gold[1] == GOLD_1
    assert gold[2] == GoldAlignment(frozenset(), frozenset())          # blank line: no links
    assert gold[3].sure == frozenset() and gold[3].possible == {(0, 0)}


def test_read_links_text(tmp_path):
    path = write(tmp_path, "0-0 2-1 2-2\n1-0", "pred.txt")             # no final newline
    assert read_links_text(path) == {1: frozenset(PRED_1), 2: frozenset({(1, 0)})}


@pytest.mark.parametrize("text, lengths, message", [
    ("0-0\n3-x\n", None, r"line 2: malformed link '3-x'; expected 'i-j' or 'i\?j'"),
    ("0-0 1:1\n", None, r"line 1: malformed link '1:1'"),
    ("\n-1-2\n", None, r"line 2: link '-1-2' has a negative position"),
    ("0-0 1-1 0-0\n", None, r"line 1: link '0-0' is listed twice"),
    ("1?1 1?1\n", None, r"line 1: link '1\?1' is listed twice"),
    ("0-0 1-1\n1?1 1-1\n", None, r"line 2: link 1-1 is marked both sure and possible"),
    ("0-0\n0-0 2-1\n", [(2, 2), (2, 2)], r"line 2: link '2-1' is outside the sentence pair \(2 source x 2 target"),
    ("0-0\n0-1\n", [(1, 1), (1, 1)], r"line 2: link '0-1' is outside"),
    ("0-0\n", [(1, 1), (1, 1)], r"has 1 lines but sentence lengths were given for 2 pairs"),
])
def test_gold_text_errors_name_the_line(tmp_path, text, lengths, message):
    path = write(tmp_path, text)
    with pytest.raises(InputError, match=message) as err:
        read_gold_text(path, lengths=lengths)
    assert str(path) in str(err.value)


def test_text_reader_errors(tmp_path):
    with pytest.raises(InputError, match=r"line 2: possible link '1\?1' in a predicted alignment"):
        read_links_text(write(tmp_path, "0-0\n1?1\n", "pred.txt"))
    with pytest.raises(InputError, match="no such file"):
        read_gold_text(tmp_path / "absent.txt")
    with pytest.raises(InputError, match=r"line 2: not valid UTF-8"):
        read_gold_text(write(tmp_path, b"0-0\n1-1 \xff\n"))
    # Lengths given as a mapping check only the rows they name.
    assert read_gold_text(write(tmp_path, "0-0\n5-5\n"), lengths={1: (1, 1)})[2].sure == {(5, 5)}


# ---------------------------------------------------------------------------
# Parquet files
# ---------------------------------------------------------------------------

LINKS = pa.list_(pa.struct([("source", pa.int32()), ("target", pa.int32())]))
SCORED = pa.list_(pa.struct([("source", pa.int32()), ("target", pa.int32()), ("posterior", pa.float64())]))


def as_structs(links):
    return None if links is None else [{"source": i, "target": j} for i, j in links]


def write_gold_parquet(path, ids, sure, possible):
    pq.write_table(pa.table({"id": ids, "sure": pa.array([as_structs(s) for s in sure], LINKS),
                             "possible": pa.array([as_structs(p) for p in possible], LINKS)}), path)


def test_parquet_round_trip_and_evaluate(tmp_path):
    gold_path = tmp_path / "gold.parquet"
    write_gold_parquet(gold_path, ["a", "b", "c"], [[(0, 0), (1, 1)], [(0, 0)], []], [[(2, 1)], [], [(0, 0)]])
    # The tool's output: a directory of files, an extra posterior field, a null row (skipped by the aligner).
    out_dir = tmp_path / "output"
    out_dir.mkdir()
    pq.write_table(pa.table({"id": ["a", "b"], "alignment": pa.array(
        [[{"source": 0, "target": 0, "posterior": 0.9}, {"source": 2, "target": 1, "posterior": 0.6},
          {"source": 2, "target": 2, "posterior": 0.5}], None], SCORED),
        "source": ["x y z", "a b c d e f g h i j k l"], "target": ["u v w", None]}), out_dir / "part-0.parquet")
    pq.write_table(pa.table({"id": ["d"], "alignment": pa.array([[]], SCORED), "source": ["q"], "target": ["r"]}),
                   out_dir / "part-1.parquet")
    gold = read_gold_parquet(gold_path, id_column="id")
    assert gold["a"] == GOLD_1 and gold["c"].possible == {(0, 0)}
    pred = read_links_parquet(out_dir, id_column="id")
    assert pred == {"a": frozenset(PRED_1), "d": frozenset()}
    lengths = read_lengths_parquet(out_dir, id_column="id")
    assert lengths == {"a": (3, 3), "d": (1, 1)}                       # "b" has a null target text
    report = evaluate(pred, gold, lengths=lengths)
    assert report["overall"]["n_sentences"] == 1 and report["overall"]["aer"] == pytest.approx(0.4)
    assert report["missing"] == {"count": 2, "first": ["b", "c"]}
    assert report["extra"] == {"count": 1, "first": ["d"]}


@pytest.mark.parametrize("ids, sure, possible, lengths, message", [
    ([1, 2], [[(0, 0)], [(0, 0), (0, 0)]], [[], []], None, r"row 2: column 'sure': link 0-0 is listed twice"),
    ([1, 2], [[(0, 0)], [(1, 1)]], [[], [(1, 1)]], None, r"row 2: link 1-1 is in both 'sure' and 'possible'"),
    ([1, 2], [[(0, 0)], [(0, -3)]], [[], []], None, r"row 2: column 'sure': link 0 has a null or negative position"),
    ([1, 2], [[(0, 0)], [(0, 1)]], [[], [(4, 0)]], {2: (3, 3)},
     r"row 2: column 'possible': link 4-0 is outside the sentence pair \(3 source x 3"),
    ([1, 2], [[(0, 0)], None], [[], []], None, r"row 2: column 'sure' is null; use an empty list"),
    ([1, 1], [[], []], [[], []], None, r"key 1 appears in more than one row"),
    ([1, None], [[], []], [[], []], None, r"row 1: 'id' is null"),
])
def test_gold_parquet_errors_name_the_row(tmp_path, ids, sure, possible, lengths, message):
    path = tmp_path / "gold.parquet"
    write_gold_parquet(path, ids, sure, possible)
    with pytest.raises(InputError, match=message):
        read_gold_parquet(path, id_column="id", lengths=lengths)


def test_parquet_schema_errors(tmp_path):
    path = tmp_path / "pred.parquet"
    pq.write_table(pa.table({"id": [1], "alignment": pa.array([[[0, 0]]], pa.list_(pa.list_(pa.int32()))) }), path)
    with pytest.raises(InputError, match=r"column 'alignment' has type .*expected list<struct<source"):
        read_links_parquet(path, id_column="id")
    with pytest.raises(InputError, match=r"no column 'row_id'; columns are id, alignment"):
        read_links_parquet(path, id_column="row_id")
    with pytest.raises(InputError, match="no such file or directory"):
        read_links_parquet(tmp_path / "absent.parquet", id_column="id")
    not_parquet = write(tmp_path, "0-0\n", "pred.txt")
    with pytest.raises(InputError, match="cannot read as Parquet"):
        read_links_parquet(not_parquet, id_column="id")
