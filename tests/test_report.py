"""The run report: renders, parses, embeds decodable images, matches the manifests, opens in Chromium."""
from __future__ import annotations

import base64
import html.parser
import io
import json
import os
import shutil
import subprocess
import sys

import numpy as np
import pyarrow.parquet as pq
import pytest

pytest.importorskip("matplotlib", reason="the report needs matplotlib (pip install 'spark_align[report]')")

from spark_align.cli import main  # noqa: E402
from spark_align.config import CorpusConfig, RunConfig, parse_stages  # noqa: E402
from spark_align.corpus import synthetic  # noqa: E402
from spark_align.demo import write_demo_report  # noqa: E402
from spark_align.engine.run import train  # noqa: E402
from spark_align.report import (build_report, gold_scores, load_run, sample_pairs,  # noqa: E402
                                add_posteriors, write_report)

N_PAIRS = 160
MAX_LENGTH = 13  # low on purpose: some generated pairs are longer and are skipped as too_long


class ReportParser(html.parser.HTMLParser):
    """Collects images, data-key cells, section ids and links from the report."""

    def __init__(self):
        super().__init__()
        self.images, self.cells, self.ids, self.refs, self.rows = [], {}, [], [], []
        self._cell, self._in_row = None, False

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if tag == "img":
            self.images.append(a.get("src", ""))
        if "id" in a:
            self.ids.append(a["id"])
        self.refs += [a[key] for key in ("href", "src") if key in a]
        if tag == "tr":
            self._in_row = "data-iteration" in a
            if self._in_row:
                self.rows.append({"_stage_index": int(a["data-stage-index"]), "_iteration": int(a["data-iteration"])})
        if "data-key" in a:
            self._cell = (a["data-key"], a.get("data-value"))

    def handle_endtag(self, tag):
        if tag == "tr":
            self._in_row = False

    def handle_data(self, data):
        if self._cell is not None:
            key, value = self._cell
            (self.rows[-1] if self._in_row else self.cells)[key] = {"value": value, "text": data.strip()}
            self._cell = None


def parse(text: str) -> ReportParser:
    parser = ReportParser()
    parser.feed(text)
    parser.close()
    return parser


@pytest.fixture(scope="module")
def run(spark, tmp_path_factory):
    base = tmp_path_factory.mktemp("report")
    table = synthetic.demo_corpus(N_PAIRS).rename_columns(["id", "source", "target", "gold"])
    synthetic.write_parquet(table, str(base / "corpus"))
    cfg = RunConfig(corpus=CorpusConfig(path=str(base / "corpus"), id_column="id", max_length=MAX_LENGTH),
                    stages=parse_stages("ibm1:1,hmm:2"), directions="both")
    run_dir = str(base / "run")
    train(spark, cfg, run_dir, log=lambda line: None)
    out = str(base / "report.html")
    write_report(run_dir, out, n_pairs=3)
    with open(out, encoding="utf-8") as fh:
        text = fh.read()
    return {"dir": run_dir, "base": base, "report": out, "html": text, "parsed": parse(text), "corpus": table}


def manifests(run_dir):
    found = []
    for stage in sorted(os.listdir(os.path.join(run_dir, "checkpoints"))):
        for it in sorted(os.listdir(os.path.join(run_dir, "checkpoints", stage))):
            with open(os.path.join(run_dir, "checkpoints", stage, it, "manifest.json")) as fh:
                found.append(json.load(fh))
    return found


def test_report_parses_with_every_section_and_no_network(run):
    p = run["parsed"]
    for section in ("summary", "convergence", "alignments", "lexicon", "scores"):
        assert section in p.ids
    # self-contained: every reference is an in-page anchor or embedded data
    assert p.refs and all(r.startswith(("#", "data:image/png;base64,")) for r in p.refs), p.refs
    assert "http://" not in run["html"] and "https://" not in run["html"]
    # convergence, 3 grids, score histogram (no gold given, so no AER plot)
    assert len(p.images) == 5
    assert "no gold alignments were given" in run["html"]


def test_every_image_decodes(run):
    from matplotlib import image

    for src in run["parsed"].images:
        data = base64.b64decode(src.split(",", 1)[1], validate=True)
        assert data[:8] == b"\x89PNG\r\n\x1a\n"
        pixels = image.imread(io.BytesIO(data), format="png")
        assert pixels.ndim == 3 and pixels.shape[0] > 100 and pixels.shape[1] > 100
        assert pixels[..., :3].std() > 0.05  # not a blank canvas


def test_summary_numbers_equal_the_manifests(run):
    cells = run["parsed"].cells
    with open(os.path.join(run["dir"], "encoded.json")) as fh:
        encoded = json.load(fh)
    with open(os.path.join(run["dir"], "output.json")) as fh:
        output = json.load(fh)
    for key in ("n_rows", "n_kept", "n_src_tokens", "n_tgt_tokens", "src_vocab_size", "tgt_vocab_size", "n_blocks"):
        assert cells[key]["value"] == str(encoded[key]), key
        assert cells[key]["text"].replace(",", "") == str(encoded[key]), key
    for reason, n in encoded["skipped"].items():
        assert cells[f"skipped.{reason}"]["value"] == str(n)
    assert cells["output_rows"]["value"] == str(output["rows"])
    assert cells["output_checkpoint"]["value"] == output["checkpoint"] == "hmm:2"

    # Independently of the run: the corpus row count, and the too_long count by the stated rule
    # (a side with more than max_length whitespace tokens), recomputed from the input table.
    corpus = run["corpus"]
    assert cells["n_rows"]["value"] == str(corpus.num_rows)
    too_long = sum(max(len(s.split()), len(t.split())) > MAX_LENGTH
                   for s, t in zip(corpus.column("source").to_pylist(), corpus.column("target").to_pylist()))
    assert too_long > 0
    assert cells["skipped.too_long"]["value"] == str(too_long)

    found = [m for m in manifests(run["dir"]) if m["iteration"] > 0]
    rows = run["parsed"].rows
    assert [(r["_stage_index"], r["_iteration"]) for r in rows] == [(m["stage_index"], m["iteration"]) for m in found]
    for row, m in zip(rows, found):
        for d in ("forward", "reverse"):
            for what, digits in (("loglik_per_word", 4), ("perplexity", 2)):
                value = m["metrics"][d][what]
                assert float(row[f"{d}.{what}"]["value"]) == value
                assert row[f"{d}.{what}"]["text"].replace(",", "") == f"{value:.{digits}f}"
        assert float(row["seconds"]["value"]) == m["seconds"]
        assert int(row["links"]["value"]) == int(sum(m["metrics"][d]["links"] for d in ("forward", "reverse")))
    assert cells["n_iterations"]["value"] == str(len(found)) == "3"
    assert float(cells["training_seconds"]["value"]) == pytest.approx(sum(m["seconds"] for m in found), rel=1e-12)
    assert cells["status"]["text"] == "complete"


def test_grid_posteriors_agree_with_the_stored_links(run):
    view = load_run(run["dir"])
    pairs, _ = sample_pairs(view, n_pairs=5, seed=3)
    assert add_posteriors(view, pairs) is None
    assert len(pairs) == 5
    for p in pairs:
        fwd, rev = p.posteriors["forward"], p.posteriors["reverse"]
        assert fwd.shape == rev.shape == (len(p.src_words), len(p.tgt_words))
        # each generated word's posteriors over the other side sum to 1 with NULL, which is not drawn
        assert np.all(fwd.sum(axis=0) <= 1 + 1e-9) and np.all(rev.sum(axis=1) <= 1 + 1e-9)
        assert fwd.sum(axis=0).max() > 0.5
        # recomputed with the final tables, the chosen links carry exactly the posterior the output stored
        for d, grid in (("forward", fwd), ("reverse", rev)):
            assert p.links[d]
            for i, j, stored in p.links[d]:
                assert grid[i, j] == pytest.approx(stored, abs=1e-9)
        for i, j, stored in p.links["symmetrized"]:
            assert (fwd[i, j] + rev[i, j]) / 2 == pytest.approx(stored, abs=1e-6)


def test_named_ids_including_a_skipped_pair(run, capsys):
    out = pq.read_table(os.path.join(run["dir"], "output"), columns=["id", "skip_reason"]).to_pylist()
    skipped = next(r["id"] for r in out if r["skip_reason"] == "too_long")
    kept = next(r["id"] for r in out if r["skip_reason"] is None)
    target = os.path.join(str(run["base"]), "named.html")
    code = main(["report", "--run", run["dir"], "--ids", f"{kept},{skipped}", "--out", target])
    assert code == 0
    assert target in capsys.readouterr().out
    with open(target, encoding="utf-8") as fh:
        text = fh.read()
    assert f"id {kept}:" in text and f"id {skipped}:" in text
    assert "not trained on (too_long)" in text
    assert text.index(f"id {kept}:") < text.index(f"id {skipped}:")  # the order the user gave


def test_bad_requests_are_one_line_errors(run, tmp_path, capsys):
    code = main(["report", "--run", run["dir"], "--ids", "999999", "--out", str(tmp_path / "x.html")])
    err = capsys.readouterr().err
    assert code == 2 and err.count("\n") == 1 and "999999" in err and "id" in err
    code = main(["report", "--run", str(tmp_path / "nothing-here")])
    err = capsys.readouterr().err
    assert code == 2 and err.count("\n") == 1 and "not a spark_align run directory" in err
    assert not (tmp_path / "x.html").exists()


def test_run_in_progress_gets_notes_instead_of_output_sections(run, tmp_path):
    partial = str(tmp_path / "partial")
    shutil.copytree(run["dir"], partial)
    os.remove(os.path.join(partial, "output.json"))
    shutil.rmtree(os.path.join(partial, "checkpoints", "01-hmm", "iter-0002"))
    text = build_report(partial)
    p = parse(text)
    assert "in progress or stopped: 2 of 3 iterations committed" in p.cells["status"]["text"]
    assert "no output yet (training in progress" in text and "no output yet: pair scores" in text
    assert len(p.images) == 1 and len(p.rows) == 2
    assert "From checkpoint hmm:1" in text  # lexicon from the newest committed table


def test_gold_metrics_give_an_aer_plot_and_columns(run, tmp_path):
    gold_run = str(tmp_path / "gold")
    shutil.copytree(run["dir"], gold_run)
    aers = []
    for n, path in enumerate(sorted(
            os.path.join(root, "manifest.json") for root, _, files in os.walk(os.path.join(gold_run, "checkpoints"))
            if "manifest.json" in files)):
        with open(path) as fh:
            m = json.load(fh)
        aers.append(0.5 / (n + 1))
        m["metrics"]["gold"] = {"precision": 0.8, "recall": 0.7, "f1": 0.75, "aer": aers[-1], "n_missing": 0,
                                "forward": {"precision": 0.7, "recall": 0.7, "f1": 0.7, "aer": 0.3},
                                "reverse": {"precision": 0.6, "recall": 0.7, "f1": 0.65, "aer": 0.35}}
        with open(path, "w") as fh:
            json.dump(m, fh)
    text = build_report(gold_run, n_pairs=1)
    p = parse(text)
    assert len(p.images) == 4  # convergence, AER, one grid, scores
    assert [float(r["gold.alignment.aer"]["value"]) for r in p.rows] == aers
    assert [float(r["gold.reverse.aer"]["value"]) for r in p.rows] == [0.35] * len(aers)


def test_gold_scores_found_wherever_they_sit():
    # the shape training with gold writes: output alignment scores plus one entry per direction
    metrics = {"forward": {"loglik": -1.0}, "gold": {"aer": 0.2, "f1": 0.8, "n_missing": 0, "file": "g.txt",
                                                     "forward": {"aer": 0.3}, "reverse": {"aer": 0.25}}}
    found = gold_scores(metrics)
    assert set(found) == {"alignment", "forward", "reverse"}
    assert found["alignment"]["aer"] == 0.2 and found["reverse"]["aer"] == 0.25
    assert set(gold_scores({"forward": {"loglik": -2.0, "gold": {"aer": 0.3}}})) == {"forward gold"}
    assert gold_scores({"forward": {"loglik": -2.0}}) == {}


def test_report_needs_no_spark(run, tmp_path):
    target = str(tmp_path / "nospark.html")
    code = ("import sys\n"
            "class Block:\n"
            "    def find_spec(self, name, path=None, target=None):\n"
            "        if name == 'pyspark' or name.startswith('pyspark.'):\n"
            "            raise ImportError('pyspark is blocked in this test')\n"
            "sys.meta_path.insert(0, Block())\n"
            "from spark_align.report import write_report\n"
            f"write_report({run['dir']!r}, {target!r}, n_pairs=1)\n"
            "assert not any(m.startswith('pyspark') for m in sys.modules)\n")
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stderr[-2000:]
    assert os.path.getsize(target) > 10_000


def test_demo_writes_the_report_or_says_how_to_get_matplotlib(run, tmp_path, monkeypatch):
    demo_run = str(tmp_path / "demo-run")
    shutil.copytree(run["dir"], demo_run)
    lines = []
    path = write_demo_report(demo_run, lines.append)
    assert path == os.path.join(demo_run, "report.html") and os.path.getsize(path) > 10_000
    assert lines == [f"report: {path} (open it in a browser)"]
    monkeypatch.setitem(sys.modules, "matplotlib", None)
    lines.clear()
    assert write_demo_report(demo_run, lines.append) is None
    assert "pip install 'spark_align[report]'" in lines[0] and demo_run in lines[0]


CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")


@pytest.mark.slow
@pytest.mark.skipif(CHROMIUM is None, reason="Chromium is not installed (Debian package 'chromium'; "
                                             "scripts/setup.sh --test installs it)")
def test_chromium_loads_the_report_and_takes_a_screenshot(run, tmp_path):
    from matplotlib import image

    shot = tmp_path / "report.png"
    cmd = [CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
           "--disable-background-networking", "--disable-component-update", "--disable-sync",
           f"--user-data-dir={tmp_path / 'profile'}", f"--screenshot={shot}", "--window-size=1200,3000",
           f"file://{run['report']}"]
    done = subprocess.run(cmd, capture_output=True, text=True, timeout=180)
    assert done.returncode == 0, done.stderr[-2000:]
    pixels = image.imread(str(shot))
    assert pixels.shape[:2] == (3000, 1200)
    grey = pixels[..., :3].mean(axis=2)
    assert (grey < 0.3).mean() > 0.005 and (grey > 0.9).mean() > 0.3  # text and figures on a white page
    keep = os.environ.get("SPARK_ALIGN_REPORT_SCREENSHOT")
    if keep:
        shutil.copy(shot, keep)
