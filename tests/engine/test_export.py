"""Exports: links text, lexical tables, lexical weighting tables.

One small run is trained once per test session (:func:`trained_run`) and
shared with tests/engine/test_align.py (which also checks the pair scores) and
tests/reference/test_nltk_phrase_extraction.py.
"""
from __future__ import annotations

import json
import os
from collections import Counter, defaultdict

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from spark_align import export
from spark_align.cli import main
from spark_align.config import CorpusConfig, RunConfig, parse_stages
from spark_align.corpus import synthetic
from spark_align.engine.tables import MIN_PROB
from spark_align.errors import RunDirError

pytestmark = pytest.mark.spark

N_CLEAN = 300
# Filtered and empty pairs, inserted in the middle so that order is checked too.
ODD_SOURCE = ["", "ka " * 120, "ka ko", ""]
ODD_TARGET = ["o ak", "o", "", ""]
ODD_AT = 150


def demo_pairs() -> tuple[list[str], list[str]]:
    table = synthetic.demo_corpus(N_CLEAN)
    return table.column("source").to_pylist(), table.column("target").to_pylist()


def shared_corpus() -> tuple[list[str], list[str]]:
    """The demo pairs with the odd pairs inserted at ODD_AT."""
    src, tgt = demo_pairs()
    src[ODD_AT:ODD_AT] = ODD_SOURCE
    tgt[ODD_AT:ODD_AT] = ODD_TARGET
    return src, tgt


def trained_run(spark, root) -> dict:
    """Train (once per session) ibm1:2,hmm:1 in both directions on the shared text corpus."""
    root = str(root)
    run_dir = os.path.join(root, "run")
    src, tgt = shared_corpus()
    s, t = os.path.join(root, "c.src"), os.path.join(root, "c.tgt")
    # pytest may import this module twice (as a test module and from other tests): the run's
    # committed output on disk is the cache that counts.
    if not os.path.exists(os.path.join(run_dir, "output.json")):
        from spark_align.engine.run import train

        os.makedirs(root, exist_ok=True)
        for path, lines in ((s, src), (t, tgt)):
            with open(path, "w", encoding="utf-8") as fh:
                fh.write("".join(x + "\n" for x in lines))
        cfg = RunConfig(corpus=CorpusConfig(source_text=s, target_text=t), stages=parse_stages("ibm1:2,hmm:1"),
                        directions="both")
        train(spark, cfg, run_dir, log=lambda _: None)
    return {"run": run_dir, "source_text": s, "target_text": t, "source": src, "target": tgt}


@pytest.fixture(scope="module")
def trained(spark, tmp_path_factory):
    return trained_run(spark, tmp_path_factory.getbasetemp() / "shared-export-run")


def read_output(run_dir):
    return pq.read_table(os.path.join(run_dir, "output")).sort_by("_row")


def link_set(links):
    return {(x["source"], x["target"]) for x in links or []}


def parse_line(line):
    return {tuple(int(v) for v in item.split("-")) for item in line.split()}


def quiet(_):
    pass


# -- links ----------------------------------------------------------------------------------------
def test_links_text_has_one_line_per_input_line_in_order(spark, trained, tmp_path):
    out = tmp_path / "links.txt"
    info = export.export_links(spark, trained["run"], str(out), log=quiet)
    raw = out.read_bytes().decode("utf-8")
    lines = raw.split("\n")
    assert lines[-1] == ""  # every line ends with a newline
    lines = lines[:-1]
    assert len(lines) == len(trained["source"]) == info["lines"]  # filtered and empty pairs included
    output = read_output(trained["run"])
    assert output.column("line").to_pylist() == list(range(1, len(lines) + 1))
    for line, links, reason in zip(lines, output.column("alignment").to_pylist(),
                                   output.column("skip_reason").to_pylist()):
        if reason is not None:
            assert line == ""
        assert parse_line(line) == link_set(links)
    assert lines[ODD_AT:ODD_AT + len(ODD_SOURCE)] == [""] * len(ODD_SOURCE)
    # a single direction's own links on request
    fwd = tmp_path / "forward.txt"
    export.export_links(spark, trained["run"], str(fwd), alignment="forward", log=quiet)
    fwd_lines = fwd.read_text(encoding="utf-8").split("\n")[:-1]
    assert [parse_line(x) for x in fwd_lines] == [link_set(x) for x in output.column("alignment_forward").to_pylist()]
    # nothing left beside the file: no part folders, no temporary files
    assert sorted(os.listdir(tmp_path)) == ["forward.txt", "links.txt"]


def test_links_file_is_not_replaced_without_overwrite(spark, trained, tmp_path):
    out = tmp_path / "links.txt"
    out.write_text("keep me\n")
    with pytest.raises(RunDirError, match="already exists"):
        export.export_links(spark, trained["run"], str(out), log=quiet)
    assert out.read_text() == "keep me\n"
    export.export_links(spark, trained["run"], str(out), overwrite=True, log=quiet)
    assert len(out.read_text().split("\n")) == len(trained["source"]) + 1
    assert sorted(os.listdir(tmp_path)) == ["links.txt"]


def test_links_lines_pure():
    column = pa.array([[{"source": 0, "target": 1}, {"source": 2, "target": 0}], None, [],
                       [{"source": 10, "target": 3}]],
                      pa.list_(pa.struct([("source", pa.int32()), ("target", pa.int32())])))
    assert export.links_lines(column).to_pylist() == ["0-1 2-0", "", "", "10-3"]
    assert export.links_lines(column.slice(1)).to_pylist() == ["", "", "10-3"]


# -- lexical translation tables -------------------------------------------------------------------
def test_lexicon_sums_to_one_per_word_before_pruning_and_prunes_as_documented(spark, trained, tmp_path):
    full_dir = tmp_path / "full"
    manifest = export.export_lexicon(spark, trained["run"], str(full_dir), min_prob=0.0, top_k=0, fmt="parquet",
                                     log=quiet)
    assert manifest["checkpoint"] == "hmm:1"  # the output's checkpoint, recorded in output.json
    for direction, cond in (("forward", "source"), ("reverse", "target")):
        table = pq.read_table(full_dir / export.TABLE_NAMES[direction]).to_pandas()
        assert list(table.columns) == ["source", "target", "probability"]
        grouped = table.groupby(cond)["probability"]
        sums, n_floor = grouped.sum(), table.assign(f=table.probability <= MIN_PROB).groupby(cond)["f"].sum()
        # Each conditioning word's distribution sums to 1; entries raised to the 1e-12 floor after
        # normalisation may add at most 1e-12 each.
        assert (np.abs(sums - 1.0) <= 1e-9 + n_floor * MIN_PROB).all(), sums[np.abs(sums - 1.0) > 1e-9]
        assert export.NULL_TOKEN in set(table[cond])  # t(. | NULL) is there, under the documented token
        assert manifest["rows"][direction] == len(table)
    assert json.load(open(full_dir / "export.json"))["kind"] == "lexicon"

    pruned_dir = tmp_path / "pruned"
    export.export_lexicon(spark, trained["run"], str(pruned_dir), direction="forward", min_prob=0.01, top_k=2,
                          fmt="tsv", log=quiet)
    assert sorted(os.listdir(pruned_dir)) == ["export.json", "target_given_source.tsv"]
    lines = (pruned_dir / "target_given_source.tsv").read_text(encoding="utf-8").split("\n")
    assert lines[0] == "source\ttarget\tprobability" and lines[-1] == ""
    got = [(a, b, float(p)) for a, b, p in (x.split("\t") for x in lines[1:-1])]
    full = pq.read_table(full_dir / "target_given_source").to_pandas()
    expected = []
    for source, rows in full[full.probability >= 0.01].groupby("source", sort=False):
        rows = rows.sort_values(["probability", "target"], ascending=[False, True]).head(2)
        expected += list(zip(rows.source, rows.target, rows.probability))
    assert sorted(got) == sorted(expected)
    # the file is grouped by conditioning word, most probable first
    for (s1, _, p1), (s2, _, p2) in zip(got, got[1:]):
        assert s1.encode() <= s2.encode() and (s1 != s2 or p1 >= p2)


# -- lexical weighting tables ---------------------------------------------------------------------
LINK = pa.struct([("source", pa.int32()), ("target", pa.int32()), ("posterior", pa.float64())])


def _links(*pairs):
    return [{"source": i, "target": j, "posterior": 1.0} for i, j in pairs]


def test_lexical_weights_against_a_hand_computed_example(spark):
    """Lexical weighting (Koehn, Och & Marcu 2003): relative frequencies of links, NULL for unaligned words.

    Pairs and links (source index-target index):
      1. "a b c" / "x y"    0-0 1-0
      2. "a c"   / "x z y"  0-0 1-2
      3. "B a"   / "y x"    1-1 0-0        -> lowercased: "b a"
    Unaligned: c and y in pair 1, z in pair 2.
    Link counts c(s, t): (a,x)=3, (b,x)=1, (b,y)=1, (c,y)=1, (c,NULL)=1, (NULL,y)=1, (NULL,z)=1.
    w(t | s): a: x 3/3 | b: x 1/2, y 1/2 | c: y 1/2, NULL 1/2 | NULL: y 1/2, z 1/2.
    w(s | t): x: a 3/4, b 1/4 | y: b 1/3, c 1/3, NULL 1/3 | z: NULL 1/1 | NULL: c 1/1.
    """
    rows = [("a b c", "x y", _links((0, 0), (1, 0))),
            ("a c", "x z y", _links((0, 0), (1, 2))),
            ("B a", "y x", _links((1, 1), (0, 0)))]
    df = spark.createDataFrame(rows, f"src string, tgt string, alignment array<{LINK_SQL}>")
    frames = export.lexical_weight_frames(df, source_column="src", target_column="tgt", lowercase=True,
                                          null_token="<NULL>")
    got = {d: {(r["source"], r["target"]): r["probability"] for r in frames[d].collect()} for d in frames}
    N = "<NULL>"
    assert got["forward"] == pytest.approx({("a", "x"): 1.0, ("b", "x"): 0.5, ("b", "y"): 0.5, ("c", "y"): 0.5,
                                            ("c", N): 0.5, (N, "y"): 0.5, (N, "z"): 0.5}, abs=1e-15)
    assert got["reverse"] == pytest.approx({("a", "x"): 0.75, ("b", "x"): 0.25, ("b", "y"): 1 / 3, ("c", "y"): 1 / 3,
                                            (N, "y"): 1 / 3, ("c", N): 1.0, (N, "z"): 1.0}, abs=1e-15)


LINK_SQL = "struct<source:int,target:int,posterior:double>"


def test_lexical_weights_export_counts_the_symmetrized_links(spark, trained, tmp_path):
    out = tmp_path / "weights"
    export.export_lexical_weights(spark, trained["run"], str(out), log=quiet)
    assert sorted(os.listdir(out)) == ["export.json", "source_given_target", "source_given_target.tsv",
                                       "target_given_source", "target_given_source.tsv"]
    # recount from the output corpus with plain Python
    counts = Counter()
    output = read_output(trained["run"])
    for src, tgt, links in zip(output.column("source").to_pylist(), output.column("target").to_pylist(),
                               output.column("alignment").to_pylist()):
        if links is None:
            continue
        s, t = src.split(), tgt.split()
        pairs = link_set(links)
        counts.update((s[i], t[j]) for i, j in pairs)
        counts.update((w, "<NULL>") for i, w in enumerate(s) if all(i != a for a, _ in pairs))
        counts.update(("<NULL>", w) for j, w in enumerate(t) if all(j != b for _, b in pairs))
    by_src, by_tgt = defaultdict(int), defaultdict(int)
    for (s, t), n in counts.items():
        by_src[s] += n
        by_tgt[t] += n
    fwd = pq.read_table(out / "target_given_source").to_pylist()
    rev = pq.read_table(out / "source_given_target").to_pylist()
    assert {(r["source"], r["target"]): r["probability"] for r in fwd} == pytest.approx(
        {k: n / by_src[k[0]] for k, n in counts.items()}, rel=1e-12)
    assert {(r["source"], r["target"]): r["probability"] for r in rev} == pytest.approx(
        {k: n / by_tgt[k[1]] for k, n in counts.items()}, rel=1e-12)
    tsv = (out / "source_given_target.tsv").read_text(encoding="utf-8").split("\n")
    assert tsv[0] == "source\ttarget\tprobability" and len(tsv) == len(rev) + 2


# -- command line ---------------------------------------------------------------------------------
def _cli(capsys, *args):
    try:
        code = main([*args, "--master", "local[2]"])
    except SystemExit as exc:  # argparse rejects the value: usage line, then one error line, exit 2
        code = exc.code
    return code, capsys.readouterr().err.strip()


def _one_line(code, err, *needles):
    assert code == 2, err
    lines = [x for x in err.splitlines() if x.startswith("spark-align")]
    assert len(lines) == 1 and "Traceback" not in err, err
    for needle in needles:
        assert needle in lines[0], lines[0]


@pytest.mark.parametrize("args, needles", [
    (["export", "lexicon", "--min-prob", "2"], ["--min-prob", "between 0 and 1"]),
    (["export", "lexicon", "--top-k", "-1"], ["--top-k", "0 or more"]),
    (["export", "lexicon", "--checkpoint", "hmm"], ["MODEL:ITERATION", "'hmm'"]),
    (["export", "lexicon", "--null-token", "a b"], ["--null-token"]),
    (["export", "links", "--alignment", "both"], ["--alignment", "invalid choice"]),
    (["export", "lexical-weights", "--format", "csv"], ["--format", "invalid choice"]),
    (["align", "--corpus", "x.parquet", "--checkpoint", "ibm1:two"], ["MODEL:ITERATION"]),
])
def test_bad_options_are_one_line_errors(capsys, tmp_path, args, needles):
    code, err = _cli(capsys, *args, "--run", str(tmp_path / "run"), "--out", str(tmp_path / "out"))
    _one_line(code, err, *needles)
    assert not (tmp_path / "out").exists()


def test_missing_run_and_unfinished_run_are_one_line_errors(spark, capsys, tmp_path):
    code, err = _cli(capsys, "export", "links", "--run", str(tmp_path / "nope"), "--out", str(tmp_path / "l.txt"))
    _one_line(code, err, "no run.json", "nope")
    run = tmp_path / "partial"
    run.mkdir()
    (run / "run.json").write_text(json.dumps({"format_version": 1, "config": json.loads(
        RunConfig(corpus=CorpusConfig(source_text="a", target_text="b")).to_json())}))
    (run / "encoded.json").write_text(json.dumps({"src_vocab_size": 1, "tgt_vocab_size": 1}))
    code, err = _cli(capsys, "export", "lexical-weights", "--run", str(run), "--out", str(tmp_path / "w"))
    _one_line(code, err, "no committed output")
    code, err = _cli(capsys, "export", "lexicon", "--run", str(run), "--out", str(tmp_path / "w"))
    _one_line(code, err, "no committed checkpoint")
    assert not (tmp_path / "w").exists() and not (tmp_path / "l.txt").exists()
