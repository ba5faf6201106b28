"""The run report: one self-contained HTML file that shows how a run went.

Sections: run summary, convergence plots, alignment grids of sample pairs,
top translations of frequent words, and a histogram of pair scores. Every
figure is a matplotlib PNG (Agg backend) embedded as base64, so the file opens
offline in any browser. Figures use shades of grey with markers, line styles
and hatching, never colour alone.

What it reads (never Spark, never retraining): ``run.json``, ``encoded.json``,
checkpoint manifests, ``vocab/``, the ``lex/`` table of one checkpoint, the
encoded blocks of the sampled pairs, ``output/`` and ``output.json``; Parquet
through pyarrow on the run directory's fsspec filesystem. Costs: the score
histogram reads two float columns of the whole output; the lexicon section
scans the checkpoint table with a filter on the few word ids it shows; the
grids read the blocks holding the sampled pairs.

Shading of the grids: the output stores only the posterior of chosen links,
so the report recomputes every cell's posterior for the sampled pairs with the
final tables and the same pure kernels that trained and decoded them
(``model.decode(..., method="posterior")``). The forward panel shades
p(a_j = i | source, target) (each target column sums to 1 with NULL, which is
not drawn), the reverse panel the same with the sides swapped, and the
symmetrized panel their mean (what the output stores as a combined link's
posterior).

A run in progress works: sections whose data does not exist yet are replaced
by a note saying why.
"""
from __future__ import annotations

import base64
import html
import io
import math
import os
import posixpath
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.dataset as ds

from spark_align.errors import ConfigError, RunDirError
from spark_align.store import Checkpoint, RunStore

DIRECTION_LABEL = {"forward": "forward  p(target | source)", "reverse": "reverse  p(source | target)"}
DIRECTION_STYLE = {  # grey-scale safe: line style and marker carry the meaning
    "forward": dict(color="0.05", linestyle="-", marker="o", markerfacecolor="0.05"),
    "reverse": dict(color="0.35", linestyle="--", marker="s", markerfacecolor="white"),
}
PAGE_INCHES = 10.3        # width of the page's figures at savefig dpi 110 (the HTML column is 1116 px)
MAX_SAMPLE_LENGTH = 30     # random samples avoid pairs longer than this (grids stay legible)
SAMPLE_CANDIDATES = 5000   # random samples are drawn from the first rows of the output, not all of it


class ReportError(RunDirError):
    """The run directory cannot be reported on (not a run, or unreadable)."""


# -- reading the run directory ----------------------------------------------------------
@dataclass
class RunView:
    """What a run directory holds right now (any of it may still be missing)."""

    store: RunStore
    run_info: dict
    encoded: dict | None
    checkpoints: list[Checkpoint]
    output: dict | None
    warnings: list[str] = field(default_factory=list)

    @property
    def config(self) -> dict:
        return (self.output or {}).get("config") or self.run_info.get("config", {})

    @property
    def directions(self) -> tuple[str, ...]:
        d = self.config.get("directions", "forward")
        return ("forward", "reverse") if d == "both" else (d,)

    @property
    def trained(self) -> list[Checkpoint]:
        """Checkpoints of EM iterations (iteration 0, a random start, has no metrics)."""
        return [c for c in self.checkpoints if c.iteration > 0 and "metrics" in c.manifest]

    def final_checkpoint(self) -> Checkpoint | None:
        """The checkpoint the output was decoded with, else the newest one with a table."""
        if self.output is not None:
            model, _, it = str(self.output.get("checkpoint", "")).partition(":")
            for c in self.checkpoints:
                if (c.model == model and str(c.iteration) == it
                        and c.stage_index == self.output.get("stage_index", c.stage_index)):
                    return c
        with_table = [c for c in self.checkpoints if "table" in c.manifest]
        return with_table[-1] if with_table else None


def load_run(run_dir: str) -> RunView:
    """Read the small JSON files of a run directory; raises :class:`ReportError` if it is not a run."""
    store = RunStore(run_dir)
    run_info = store.read_json("run.json")
    if run_info is None:
        raise ReportError(f"{store.url} has no run.json: it is not a spark_align run directory "
                          f"(or training has not started)")
    return RunView(store, run_info, store.read_json("encoded.json"), store.checkpoints(),
                   store.read_json("output.json"))


def read_parquet(store: RunStore, *parts: str, columns: Sequence[str] | None = None,
                 filter=None) -> pa.Table:
    """A Parquet directory of the run as one Arrow table (hidden and ``_`` files are skipped)."""
    path = posixpath.join(store.root, *parts)
    dataset = ds.dataset(path, format="parquet", filesystem=store.fs)
    return dataset.to_table(columns=list(columns) if columns is not None else None, filter=filter)


# -- per-iteration figures ---------------------------------------------------------------
def iteration_rows(checkpoints: Sequence[Checkpoint]) -> list[dict]:
    """One dict per EM iteration, oldest first: stage, iteration, metrics, seconds, gold scores."""
    rows = []
    for c in checkpoints:
        m = c.manifest
        if c.iteration == 0 or "metrics" not in m:
            continue
        metrics = m["metrics"]
        rows.append({
            "step": len(rows) + 1,
            "stage_index": c.stage_index,
            "stage": c.model,
            "iteration": c.iteration,
            "stage_iterations": m.get("stage_iterations"),
            "seconds": m.get("seconds"),
            "directions": {d: v for d, v in metrics.items() if isinstance(v, dict) and "loglik_per_word" in v},
            "gold": gold_scores(metrics),
            "committed_at": m.get("committed_at"),
        })
    return rows


def gold_scores(metrics: dict) -> dict[str, dict]:
    """AER entries (dicts holding ``aer``) found anywhere in a manifest's metrics, by where they sit.

    Training with gold links stores ``metrics.gold`` = the scores of the output
    alignment plus ``forward`` and ``reverse`` entries; that gives the labels
    ``alignment``, ``forward`` and ``reverse``. Entries elsewhere are labelled by
    their path (``forward gold`` for ``metrics.forward.gold``).
    """
    found: dict[str, dict] = {}

    def walk(node: dict, path: tuple[str, ...]) -> None:
        if "aer" in node and isinstance(node["aer"], (int, float)):
            label = " ".join(path[1:] if path[:1] == ("gold",) else path) or "alignment"
            found[label] = node
        for key, value in node.items():
            if isinstance(value, dict):
                walk(value, path + (str(key),))

    walk(metrics, ())
    return found


# -- sampled pairs and their posteriors ---------------------------------------------------
@dataclass
class PairGrid:
    """One sampled pair, ready to draw.

    ``posteriors``: direction -> float64 array, shape (n_src, n_tgt); ``links``:
    'forward' / 'reverse' / 'symmetrized' -> list of (source index, target index, stored posterior).
    """

    key: str
    row: int
    src_words: list[str]
    tgt_words: list[str]
    skip_reason: str | None = None
    posteriors: dict[str, np.ndarray] = field(default_factory=dict)
    links: dict[str, list[tuple[int, int, float]]] = field(default_factory=dict)


def id_column(view: RunView) -> str:
    """The output column ``--ids`` refers to: the corpus id column, else ``line`` (text input), else ``_row``."""
    corpus = view.config.get("corpus", {})
    if corpus.get("id_column"):
        return corpus["id_column"]
    return "line" if corpus.get("path") is None else "_row"


def _text_columns(view: RunView) -> tuple[str, str]:
    corpus = view.config.get("corpus", {})
    if corpus.get("path") is None:
        return "source", "target"
    return corpus.get("source_column", "source"), corpus.get("target_column", "target")


def _tokens(texts: pa.Array) -> list[list[str]]:
    from spark_align.corpus.text import tokenize

    if isinstance(texts, pa.ChunkedArray):
        texts = texts.combine_chunks()
    return tokenize(texts, False).to_pylist()


def sample_pairs(view: RunView, *, n_pairs: int = 4, ids: Sequence[str] | None = None,
                 seed: int = 0) -> tuple[list[PairGrid], str]:
    """The pairs to draw, with their words and stored links; and a note on how they were chosen.

    With ``ids``, every id must exist in the output (:class:`ConfigError` naming the
    missing ones otherwise). Without, ``n_pairs`` trained pairs of at most
    ``MAX_SAMPLE_LENGTH`` tokens a side are drawn with a fixed seed from the first
    ``SAMPLE_CANDIDATES`` rows of the output.
    """
    src_col, tgt_col = _text_columns(view)
    key_col = id_column(view)
    link_cols = ["alignment"] + [f"alignment_{d}" for d in view.directions if len(view.directions) == 2]
    columns = list(dict.fromkeys(["_row", key_col, src_col, tgt_col, "skip_reason", *link_cols]))
    dataset = ds.dataset(posixpath.join(view.store.root, "output"), format="parquet", filesystem=view.store.fs)
    if ids:
        field_type = dataset.schema.field(key_col).type
        try:
            wanted = pa.array(list(ids)).cast(field_type)
        except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
            raise ConfigError(f"--ids: {', '.join(ids)} are not valid values of the output column "
                              f"{key_col!r} ({field_type})") from None
        table = dataset.to_table(columns=columns, filter=pc.field(key_col).isin(wanted))
        found = {str(v) for v in table.column(key_col).to_pylist()}
        missing = [i for i, w in zip(ids, wanted.to_pylist()) if str(w) not in found]
        if missing:
            raise ConfigError(f"--ids: no row with {key_col} {', '.join(missing)} in {view.store.url}/output")
        order = {str(w.as_py()): k for k, w in enumerate(wanted)}
        table = table.take(sorted(range(table.num_rows), key=lambda r: order[str(table.column(key_col)[r].as_py())]))
        note = f"pairs chosen by {key_col}: {', '.join(ids)}"
    else:
        batches, n = [], 0
        for batch in dataset.to_batches(columns=columns):
            batches.append(batch)
            n += batch.num_rows
            if n >= SAMPLE_CANDIDATES:
                break
        table = pa.Table.from_batches(batches, schema=dataset.schema.empty_table().select(columns).schema)
        src_len = np.array([len(t) for t in _tokens(table.column(src_col))])
        tgt_len = np.array([len(t) for t in _tokens(table.column(tgt_col))])
        trained = table.column("skip_reason").is_null().to_numpy(zero_copy_only=False)
        short = trained & (src_len <= MAX_SAMPLE_LENGTH) & (tgt_len <= MAX_SAMPLE_LENGTH)
        pool = np.flatnonzero(short) if short.any() else np.flatnonzero(trained)
        rng = np.random.default_rng(seed)
        chosen = np.sort(rng.choice(pool, size=min(n_pairs, len(pool)), replace=False)) if len(pool) else pool
        table = table.take(chosen)
        note = (f"{len(chosen)} trained pairs drawn at random (seed {seed}) from the first {min(n, SAMPLE_CANDIDATES)} "
                f"rows of the output, preferring pairs of at most {MAX_SAMPLE_LENGTH} tokens a side; "
                f"choose others with --ids")
    src_words, tgt_words = _tokens(table.column(src_col)), _tokens(table.column(tgt_col))
    pairs = []
    for k, row in enumerate(table.to_pylist()):
        grid = PairGrid(str(row[key_col]), int(row["_row"]), src_words[k], tgt_words[k], row["skip_reason"])
        if row["skip_reason"] is None:
            for col in link_cols:
                name = "symmetrized" if col == "alignment" and len(view.directions) == 2 else (
                    col.removeprefix("alignment_") if col != "alignment" else view.directions[0])
                grid.links[name] = [(a["source"], a["target"], a["posterior"]) for a in row[col] or []]
        pairs.append(grid)
    return pairs, note


def _lex_tables(view: RunView, ckpt: Checkpoint, src_ids: np.ndarray, tgt_ids: np.ndarray):
    """DirectionTables of ``ckpt`` restricted to the given word ids (NULL included)."""
    from spark_align.engine.tables import DIRS, DirectionTable
    from spark_align.kernels import ragged

    rel = RunStore.checkpoint_dir(ckpt.stage_index, ckpt.model, ckpt.iteration)
    src_set = pa.array(np.union1d(src_ids, [0]).astype(np.int32))
    tgt_set = pa.array(np.union1d(tgt_ids, [0]).astype(np.int32))
    table = read_parquet(view.store, rel, "lex", filter=pc.field("src").isin(src_set) & pc.field("tgt").isin(tgt_set))
    dir_col = table.column("dir").to_numpy()
    keys = ragged.make_key(table.column("src").to_numpy(), table.column("tgt").to_numpy())
    probs = table.column("prob").to_numpy()
    out = {}
    for d in view.directions:
        sel = dir_col == DIRS.index(d)
        order = np.argsort(keys[sel], kind="stable")
        out[d] = DirectionTable(keys[sel][order], probs[sel][order])
    return out


def add_posteriors(view: RunView, pairs: list[PairGrid]) -> str | None:
    """Recompute every cell's posterior of the trained sampled pairs; returns a note if it cannot."""
    from spark_align.config import RunConfig
    from spark_align.engine.em import dense_from_json
    from spark_align.engine.ingest import block_id_of
    from spark_align.engine.output import directional_links
    from spark_align.kernels import ragged

    trained = [p for p in pairs if p.skip_reason is None]
    ckpt = view.final_checkpoint()
    if not trained:
        return None
    if ckpt is None or "table" not in ckpt.manifest:
        return "no checkpoint table to recompute posteriors from; only chosen links are shown"
    cfg = RunConfig.from_dict(view.config)
    model = cfg.stages[ckpt.stage_index].build()
    dense = dense_from_json(ckpt.manifest.get("dense", {}))
    rows = np.array([p.row for p in trained], dtype=np.int64)
    wanted_blocks = pa.array(np.unique(block_id_of(rows, cfg.block_size)))
    blocks = read_parquet(view.store, "encoded", "blocks",
                          columns=["rows", "src_len", "src_ids", "tgt_len", "tgt_ids"],
                          filter=pc.field("block_id").isin(wanted_blocks))
    ids: dict[int, tuple[np.ndarray, np.ndarray]] = {}
    for b in blocks.to_pylist():
        src_off = ragged.offsets_from_lengths(np.asarray(b["src_len"], np.int64))
        tgt_off = ragged.offsets_from_lengths(np.asarray(b["tgt_len"], np.int64))
        src_all, tgt_all = np.asarray(b["src_ids"], np.int32), np.asarray(b["tgt_ids"], np.int32)
        for k, r in enumerate(b["rows"]):
            if r in set(rows.tolist()):
                ids[r] = (src_all[src_off[k]:src_off[k + 1]], tgt_all[tgt_off[k]:tgt_off[k + 1]])
    lost = [p.key for p in trained if p.row not in ids]
    if lost:
        return f"the encoded blocks hold no pair with id {', '.join(lost)}; only chosen links are shown"
    src_ids = [ids[p.row][0] for p in trained]
    tgt_ids = [ids[p.row][1] for p in trained]
    # The sampled pairs become one small block: the kernels see exactly what training saw.
    block = ragged.build_block(ragged.offsets_from_lengths(np.array([len(s) for s in src_ids])), np.concatenate(src_ids),
                               ragged.offsets_from_lengths(np.array([len(t) for t in tgt_ids])), np.concatenate(tgt_ids))
    tables = _lex_tables(view, ckpt, block.src_ids, block.tgt_ids)
    for d in view.directions:
        token, cond_pos, post = model.decode(block.view(d), tables[d].local(block.dict_keys), dense.get(d, {}),
                                             method="posterior", threshold=0.0)
        pair, src_i, tgt_j, post = directional_links(block, d, token, cond_pos, post)
        for k, p in enumerate(trained):
            grid = np.zeros((len(src_ids[k]), len(tgt_ids[k])))
            sel = pair == k
            grid[src_i[sel], tgt_j[sel]] = post[sel]
            p.posteriors[d] = grid
    for p in trained:
        if len(p.src_words) != len(src_ids[trained.index(p)]) or len(p.tgt_words) != len(tgt_ids[trained.index(p)]):
            return f"pair {p.key}: the output text and the encoded pair differ in length; posteriors not shown"
    return None


# -- lexicon samples ----------------------------------------------------------------------
def top_translations(view: RunView, ckpt: Checkpoint, *, n_words: int = 12, n_best: int = 5,
                     min_prob: float = 0.0) -> dict[str, list]:
    """For the ``n_words`` most frequent words of each side: (word, count, [(translation, prob), ...]).

    'source' uses t(target | source) (dir 0), 'target' t(source | target) (dir 1);
    a side whose direction was not trained is absent. At most ``n_best`` translations
    per word, each with probability >= ``min_prob``.
    """
    rel = RunStore.checkpoint_dir(ckpt.stage_index, ckpt.model, ckpt.iteration)
    vocab = {side: read_parquet(view.store, "vocab", side, filter=(pc.field("id") > 0) & (pc.field("id") <= n_words))
             .sort_by("id") for side in ("source", "target")}
    out = {}
    for side, direction, dir_code, cond, gen in (("source", "forward", 0, "src", "tgt"),
                                                  ("target", "reverse", 1, "tgt", "src")):
        if direction not in view.directions:
            continue
        cond_ids = vocab[side].column("id")
        table = read_parquet(view.store, rel, "lex", filter=(pc.field("dir") == dir_code) & pc.field(cond).isin(cond_ids))
        table = table.sort_by([(cond, "ascending"), ("prob", "descending")])
        cond_col, gen_col, prob_col = (table.column(c).to_numpy() for c in (cond, gen, "prob"))
        other = "target" if side == "source" else "source"
        gen_words = _words_of(view, other, np.unique(gen_col))
        rows = []
        for word, wid, count in zip(*(vocab[side].column(c).to_pylist() for c in ("word", "id", "count"))):
            sel = np.flatnonzero((cond_col == wid) & (prob_col >= min_prob))[:n_best]
            rows.append((word, count, [(gen_words.get(int(g), "NULL"), float(p))
                                       for g, p in zip(gen_col[sel], prob_col[sel])]))
        out[side] = rows
    return out


def _words_of(view: RunView, side: str, word_ids: np.ndarray) -> dict[int, str]:
    table = read_parquet(view.store, "vocab", side, columns=["id", "word"],
                         filter=pc.field("id").isin(pa.array(word_ids.astype(np.int32))))
    return dict(zip(table.column("id").to_pylist(), table.column("word").to_pylist()))


def pair_scores(view: RunView) -> dict[str, np.ndarray]:
    """Non-null pair scores per direction (float64 arrays), from the output."""
    cols = [f"score_{d}" for d in view.directions]
    table = read_parquet(view.store, "output", columns=cols)
    out = {}
    for d, c in zip(view.directions, cols):
        values = table.column(c).drop_null().to_numpy()
        out[d] = values[np.isfinite(values)]
    return out


# -- figures ------------------------------------------------------------------------------
def _plt():
    import matplotlib

    matplotlib.use("Agg", force=True)
    import matplotlib.pyplot as plt

    plt.rcParams.update({
        "font.size": 10, "axes.titlesize": 11, "axes.labelsize": 10, "axes.spines.top": False,
        "axes.spines.right": False, "axes.edgecolor": "0.3", "axes.grid": True, "grid.color": "0.88",
        "grid.linewidth": 0.6, "legend.frameon": False, "figure.dpi": 100, "savefig.dpi": 110,
    })
    return plt


def figure_png(fig) -> str:
    """A matplotlib figure as a base64 PNG (the figure is closed)."""
    plt = _plt()
    buf = io.BytesIO()
    fig.savefig(buf, format="png", bbox_inches="tight", facecolor="white")
    plt.close(fig)
    return base64.b64encode(buf.getvalue()).decode("ascii")


def _stage_bands(ax, rows: list[dict]) -> None:
    """Alternate light bands per stage, labelled with the model name, at the top of the axes."""
    starts = [k for k, r in enumerate(rows) if k == 0 or r["stage_index"] != rows[k - 1]["stage_index"]]
    for n, start in enumerate(starts):
        stop = starts[n + 1] if n + 1 < len(starts) else len(rows)
        lo, hi = rows[start]["step"] - 0.5, rows[stop - 1]["step"] + 0.5
        if n % 2 == 1:
            ax.axvspan(lo, hi, color="0.93", zorder=0, linewidth=0)
        if n > 0:
            ax.axvline(lo, color="0.45", linestyle=":", linewidth=1, zorder=1)
        ax.text((lo + hi) / 2, 1.01, f"stage {rows[start]['stage_index'] + 1}: {rows[start]['stage']}",
                transform=ax.get_xaxis_transform(), ha="center", va="bottom", fontsize=9, color="0.2")


def _iteration_axis(ax, rows: list[dict]) -> None:
    ax.set_xlim(rows[0]["step"] - 0.5, rows[-1]["step"] + 0.5)
    steps = [r["step"] for r in rows]
    ax.set_xticks(steps, [str(r["iteration"]) for r in rows])
    ax.set_xlabel("iteration within stage")
    ax.grid(axis="x", visible=False)


def convergence_figure(rows: list[dict], directions: Sequence[str]):
    plt = _plt()
    fig, axes = plt.subplots(1, 2, figsize=(11, 3.8), constrained_layout=True)
    steps = [r["step"] for r in rows]
    for ax, key, title in ((axes[0], "loglik_per_word", "log-likelihood per word (higher is better)"),
                           (axes[1], "perplexity", "perplexity per word (lower is better, log scale)")):
        _stage_bands(ax, rows)
        for d in directions:
            values = [r["directions"].get(d, {}).get(key, np.nan) for r in rows]
            ax.plot(steps, values, label=DIRECTION_LABEL[d], linewidth=1.8, markersize=6, **DIRECTION_STYLE[d])
        _iteration_axis(ax, rows)
        ax.set_title(title, pad=18)
        if key == "perplexity":
            ax.set_yscale("log")
    axes[0].legend(loc="lower right")
    return fig


GOLD_STYLES = [dict(color="0.05", linestyle="-", marker="D"), dict(color="0.3", linestyle="--", marker="o"),
               dict(color="0.5", linestyle="-.", marker="s", markerfacecolor="white"),
               dict(color="0.2", linestyle=":", marker="^")]


def aer_figure(rows: list[dict]):
    plt = _plt()
    labels = list(dict.fromkeys(label for r in rows for label in r["gold"]))
    fig, ax = plt.subplots(figsize=(11, 3.4), constrained_layout=True)
    _stage_bands(ax, rows)
    for n, label in enumerate(labels):
        pts = [(r["step"], r["gold"][label]["aer"]) for r in rows if label in r["gold"]]
        ax.plot(*zip(*pts), label=f"{label} ({len(pts)} iterations)" if len(pts) < len(rows) else label, linewidth=1.8, markersize=6, **GOLD_STYLES[n % len(GOLD_STYLES)])
    _iteration_axis(ax, rows)
    ax.set_title("alignment error rate against the gold links (lower is better)", pad=18)
    ax.set_ylabel("AER")
    ax.legend(loc="upper right")
    return fig


def grid_figure(pair: PairGrid, directions: Sequence[str], symmetrization: str):
    """Side-by-side panels (each direction, then symmetrized): posteriors as shading, chosen links as rings."""
    plt = _plt()
    panels = []
    for d in directions:
        panels.append((DIRECTION_LABEL[d], pair.posteriors.get(d), pair.links.get(d, [])))
    if len(directions) == 2:
        mean = (pair.posteriors["forward"] + pair.posteriors["reverse"]) / 2 if pair.posteriors else None
        panels.append((f"symmetrized  ({symmetrization})", mean, pair.links.get("symmetrized", [])))
    n_src, n_tgt = len(pair.src_words), len(pair.tgt_words)
    label_room = 0.075 * max(len(w) for w in pair.src_words + pair.tgt_words + ["x"])
    # Size cells so a row of panels fits the page at its natural size; fewer panels a row if cells get too small.
    for ncols in sorted({len(panels), min(2, len(panels)), 1}, reverse=True):
        cell = min(0.27, (PAGE_INCHES - 1.0 - ncols * (label_room + 0.3)) / (ncols * max(n_tgt, 1)))
        if cell >= 0.17:
            break
    cell = max(cell, 0.1)
    nrows = -(-len(panels) // ncols)
    font = 9 if cell >= 0.2 else 8
    width = ncols * (n_tgt * cell + label_room + 0.3) + 0.8
    height = nrows * (n_src * cell + label_room + 0.7) + 0.3
    fig, axes = plt.subplots(nrows, ncols, figsize=(max(width, 4), max(height, 2.5)), squeeze=False,
                             constrained_layout=True)
    image = None
    spare = axes.ravel()[len(panels):]
    for ax in spare:
        ax.axis("off")
    for ax, (title, post, links) in zip(axes.ravel(), panels):
        shade = post if post is not None else np.zeros((n_src, n_tgt))
        image = ax.imshow(shade, cmap="Greys", vmin=0.0, vmax=1.25, aspect="equal", interpolation="nearest")
        if links:
            src_i, tgt_j = [a[0] for a in links], [a[1] for a in links]
            ax.scatter(tgt_j, src_i, s=46 * (cell / 0.27) ** 2, facecolors="white", edgecolors="black", linewidths=1.4, zorder=3)
        ax.set_xticks(range(n_tgt), pair.tgt_words, rotation=90, fontsize=font)
        ax.set_yticks(range(n_src), pair.src_words, fontsize=font)
        ax.xaxis.tick_top()
        ax.tick_params(length=0)
        ax.set_xticks(np.arange(-0.5, n_tgt, 1), minor=True)
        ax.set_yticks(np.arange(-0.5, n_src, 1), minor=True)
        ax.grid(which="minor", color="0.82", linewidth=0.5)
        ax.grid(which="major", visible=False)
        for spine in ax.spines.values():
            spine.set_visible(True)
            spine.set_color("0.5")
        ax.xaxis.set_label_position("bottom")
        ax.set_xlabel(title, fontsize=10, loc="left", labelpad=6)
    if image is not None and any(p[1] is not None for p in panels):
        if len(spare):  # the free slot of a 2 x 2 layout holds the scale
            bar = fig.colorbar(image, cax=spare[0].inset_axes([0.04, 0.3, 0.05, 0.6]))
        else:
            bar = fig.colorbar(image, ax=axes.ravel().tolist(), shrink=min(0.8, 3.0 / max(height, 1)), pad=0.02,
                               aspect=18)
        bar.ax.grid(False)
        bar.set_ticks([0, 0.25, 0.5, 0.75, 1.0])
        bar.set_label("posterior")
        bar.ax.set_ylim(0, 1)
    return fig


def score_figure(scores: dict[str, np.ndarray]):
    plt = _plt()
    fig, ax = plt.subplots(figsize=(11, 3.6), constrained_layout=True)
    everything = np.concatenate(list(scores.values()))
    lo, hi = np.percentile(everything, [0.5, 100]) if len(everything) else (0, 1)
    bins = np.linspace(lo, hi if hi > lo else lo + 1, 41)
    for d, values in scores.items():
        style = DIRECTION_STYLE[d]
        clipped = np.clip(values, bins[0], bins[-1])
        if d == "forward":  # hatched fill for one direction, outline only for the other
            ax.hist(clipped, bins=bins, histtype="stepfilled", facecolor="none", edgecolor="0.55", hatch="///",
                    linewidth=0)
        ax.hist(clipped, bins=bins, histtype="step", color=style["color"], linestyle=style["linestyle"],
                linewidth=1.8, label=f"score_{d}  (n = {len(values):,})")
    first = next(iter(scores.values()))
    for q in (5, 25):
        if len(first):
            x = float(np.percentile(first, q))
            ax.axvline(x, color="0.2", linestyle=":", linewidth=1.2)
            ax.text(x, 1.0, f"{q}%", transform=ax.get_xaxis_transform(), fontsize=9, ha="center", va="bottom",
                    color="0.2")
    ax.set_xlabel("log-probability per word of the pair under the final model (higher = looks more like a translation)")
    ax.set_ylabel("pairs")
    ax.set_title("pair scores (the lowest 0.5% are gathered in the first bin)", pad=16)
    ax.legend(loc="upper right")
    return fig


# -- HTML -----------------------------------------------------------------------------------
CSS = """
body { font-family: "DejaVu Sans", "Liberation Sans", Helvetica, Arial, sans-serif; color: #1a1a1a;
       background: #fff; margin: 0; }
main { max-width: 1116px; margin: 0 auto; padding: 24px 32px 64px; }
h1 { font-size: 26px; margin: 0 0 4px; }
h2 { font-size: 20px; margin: 40px 0 10px; padding-bottom: 4px; border-bottom: 2px solid #222; }
h3 { font-size: 15px; margin: 22px 0 6px; }
p.sub { color: #555; margin: 0 0 12px; font-size: 14px; }
nav { font-size: 14px; margin: 12px 0 0; }
nav a { color: #222; margin-right: 16px; }
.note { border-left: 4px solid #888; background: #f3f3f3; padding: 8px 12px; margin: 10px 0; font-size: 14px; }
.status { display: inline-block; padding: 2px 10px; border: 1.5px solid #222; border-radius: 3px;
          font-size: 13px; font-weight: bold; }
.status.progress { border-style: dashed; }
table { border-collapse: collapse; font-size: 13.5px; margin: 6px 0 12px; }
td.stage { white-space: nowrap; }
th, td { padding: 4px 10px; text-align: left; border-bottom: 1px solid #ddd; vertical-align: top; }
th { background: #efefef; font-weight: 600; }
td.num, th.num { text-align: right; font-variant-numeric: tabular-nums; }
table.kv th { background: none; width: 220px; color: #444; font-weight: normal; }
.cols { display: flex; gap: 32px; flex-wrap: wrap; align-items: flex-start; }
figure { margin: 12px 0 24px; }
figure img { max-width: 100%; height: auto; display: block; }
figcaption { font-size: 13px; color: #444; margin-top: 4px; max-width: 1000px; }
.bar { display: inline-block; height: 9px; background: #555; vertical-align: middle; margin-left: 4px; }
.tr { white-space: nowrap; margin-right: 12px; }
.tr b { font-weight: 600; }
code { font-size: 13px; background: #f3f3f3; padding: 0 3px; }
footer { margin-top: 48px; font-size: 12px; color: #666; }
"""


def _e(value) -> str:
    return html.escape(str(value), quote=True)


def _num(value, digits: int | None = None) -> str:
    if value is None:
        return "—"
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, float):
        if not math.isfinite(value):
            return str(value)
        return f"{value:,.{digits}f}" if digits is not None else f"{value:.6g}"
    if isinstance(value, int):
        return f"{value:,}"
    return str(value)


def _cell(key: str, value, digits: int | None = None, *, num: bool = True) -> str:
    """A table cell carrying the exact value in ``data-value`` (what the tests compare to the manifests)."""
    raw = "" if value is None else repr(value) if isinstance(value, float) else str(value)
    cls = ' class="num"' if num else ""
    return f'<td{cls} data-key="{_e(key)}" data-value="{_e(raw)}">{_e(_num(value, digits))}</td>'


def _kv(rows: list[tuple[str, str, object]]) -> str:
    body = "".join(f"<tr><th>{_e(label)}</th>{_cell(key, value, 1 if key.endswith('seconds') else None, num=False)}"
                   f"</tr>" for label, key, value in rows)
    return f'<table class="kv">{body}</table>'


def _note(text: str) -> str:
    return f'<p class="note">{_e(text)}</p>'


def _img(b64: str, alt: str, caption: str) -> str:
    return (f'<figure><img alt="{_e(alt)}" src="data:image/png;base64,{b64}">'
            f"<figcaption>{_e(caption)}</figcaption></figure>")


def _fmt_seconds(seconds: float | None) -> str:
    if seconds is None:
        return "—"
    if seconds < 120:
        return f"{seconds:.1f} s"
    return f"{seconds / 60:.1f} min"


def summary_section(view: RunView, rows: list[dict]) -> str:
    cfg = view.config
    corpus = cfg.get("corpus", {})
    stages = cfg.get("stages", [])
    n_planned = sum(int(s.get("n_iter", 0)) for s in stages)
    parts = ['<h2 id="summary">Run summary</h2>']
    where = corpus.get("path") or f"{corpus.get('source_text')} + {corpus.get('target_text')}"
    if view.encoded is None:
        parts.append(_note("ingestion has not finished: corpus counts are not known yet"))
    enc = view.encoded or {}
    corpus_rows = [("corpus", "corpus_path", where), ("sentence pairs", "n_rows", enc.get("n_rows")),
                   ("trained on", "n_kept", enc.get("n_kept"))]
    skipped = enc.get("skipped") or {}
    corpus_rows.append(("not trained on", "n_skipped", sum(skipped.values()) if view.encoded else None))
    corpus_rows += [(f"  … {reason}", f"skipped.{reason}", n) for reason, n in sorted(skipped.items())]
    corpus_rows += [("source tokens", "n_src_tokens", enc.get("n_src_tokens")),
                    ("target tokens", "n_tgt_tokens", enc.get("n_tgt_tokens")),
                    ("source vocabulary", "src_vocab_size", enc.get("src_vocab_size")),
                    ("target vocabulary", "tgt_vocab_size", enc.get("tgt_vocab_size")),
                    ("encoded blocks", "n_blocks", enc.get("n_blocks"))]
    filters = (f"pairs with a side longer than {corpus.get('max_length')} tokens (too_long), or whose longer side "
               f"has more than {corpus.get('max_ratio')} times the tokens of the shorter (length_ratio), and pairs "
               f"with an empty side (empty_source, empty_target) are not trained on; they stay in the output with "
               f"their skip_reason")
    seconds = [r["seconds"] for r in rows if r["seconds"] is not None]
    total = float(sum(seconds)) if seconds else None
    training_rows = [
        ("stages", "stages", ", ".join(f"{s['model']}:{s['n_iter']}" + (
            f" ({', '.join(f'{k}={v}' for k, v in sorted(s.get('options', {}).items()))})" if s.get("options") else "")
            for s in stages)),
        ("directions", "directions", cfg.get("directions")),
        ("iterations committed", "n_iterations", len(rows)),
        ("iterations planned", "n_planned", n_planned),
        ("training time, seconds (sum of iterations)", "training_seconds", total),
        ("mean seconds per iteration", "mean_seconds", total / len(seconds) if seconds else None),
        ("output", "output_rows", view.output.get("rows") if view.output else "not written yet"),
    ]
    if view.output:
        training_rows += [("  … aligned", "output_aligned", view.output.get("aligned")),
                          ("  … skipped", "output_skipped", view.output.get("skipped")),
                          ("  … decoded from checkpoint", "output_checkpoint", view.output.get("checkpoint")),
                          ("  … output write seconds", "output_seconds", view.output.get("seconds"))]
    parts.append('<div class="cols"><div><h3>Corpus</h3>' + _kv(corpus_rows) + _note(filters)
                 + '</div><div><h3>Training</h3>' + _kv(training_rows) + "</div></div>")
    config_rows = [(key, f"config.{key}", cfg.get(key)) for key in
                   ("init", "seed", "block_size", "decoding", "posterior_threshold", "symmetrization") if key in cfg]
    config_rows += [(f"corpus.{key}", f"config.corpus.{key}", corpus.get(key)) for key in
                    ("source_column", "target_column", "id_column", "lowercase", "max_length", "max_ratio")
                    if key in corpus]
    config_rows += [("corpus fingerprint", "corpus_fingerprint", view.run_info.get("corpus_fingerprint")),
                    ("created", "created_at", view.run_info.get("created_at"))]
    parts.append("<h3>Configuration</h3>" + _kv(config_rows))
    if rows:
        directions = view.directions
        gold_labels = list(dict.fromkeys(label for r in rows for label in r["gold"]))
        head = ["stage", "iteration"] + [f"{d} {what}" for d in directions for what in
                                         ("log-lik / word", "perplexity")] + [f"AER ({g})" for g in gold_labels] + [
            "seconds", "kernel seconds", "links"]
        body = []
        for r in rows:
            cells = [_cell("stage", f"{r['stage_index'] + 1}: {r['stage']}", num=False).replace("<td", '<td class="stage"', 1),
                     _cell("iteration", r["iteration"])]
            for d in directions:
                m = r["directions"].get(d, {})
                cells += [_cell(f"{d}.loglik_per_word", m.get("loglik_per_word"), 4),
                          _cell(f"{d}.perplexity", m.get("perplexity"), 2)]
            cells += [_cell(f"gold.{g}.aer", r["gold"].get(g, {}).get("aer"), 4) for g in gold_labels]
            kernel = [r["directions"].get(d, {}).get("kernel_seconds") for d in directions]
            links = [r["directions"].get(d, {}).get("links") for d in directions]
            cells += [_cell("seconds", r["seconds"], 1),
                      _cell("kernel_seconds", float(sum(k for k in kernel if k is not None)), 2),
                      _cell("links", int(sum(k for k in links if k is not None)))]
            body.append(f'<tr data-stage-index="{r["stage_index"]}" data-iteration="{r["iteration"]}">'
                        + "".join(cells) + "</tr>")
        parts.append("<h3>Iterations</h3><table id=\"iterations\"><tr>"
                     + "".join(f"<th>{_e(h)}</th>" for h in head) + "</tr>" + "".join(body) + "</table>")
        parts.append(_note("log-likelihood of each iteration is that of the parameters the iteration started "
                           "from (the E-step computes it); kernel seconds and links are summed over directions "
                           "and tasks"))
    return "\n".join(parts)


def convergence_section(view: RunView, rows: list[dict]) -> str:
    parts = ['<h2 id="convergence">Convergence</h2>']
    if not rows:
        return parts[0] + _note("no iteration has been committed yet")
    parts.append(_img(figure_png(convergence_figure(rows, view.directions)), "convergence plot",
                      "Each point is one EM iteration; bands and dotted lines mark the stages. Solid line with "
                      "filled circles: forward direction; dashed line with open squares: reverse direction. A new "
                      "stage may start lower than the last stage ended: it is a different model."))
    if any(r["gold"] for r in rows):
        parts.append(_img(figure_png(aer_figure(rows)), "alignment error rate per iteration",
                          "Alignment error rate of each iteration's alignments against the gold links given at "
                          "training time."))
    else:
        parts.append(_note("no gold alignments were given at training time, so there is no AER per iteration"))
    return "\n".join(parts)


def grids_section(view: RunView, *, n_pairs: int, ids: Sequence[str] | None, seed: int) -> str:
    parts = ['<h2 id="alignments">Alignments of sample pairs</h2>']
    if view.output is None:
        return parts[0] + _note("no output yet (training in progress, or the run stopped before writing it): "
                                "alignment grids appear once output.json exists")
    pairs, how = sample_pairs(view, n_pairs=n_pairs, ids=ids, seed=seed)
    problem = add_posteriors(view, pairs)
    ckpt = view.final_checkpoint()
    parts.append(_note(how))
    shading = ("Shading: the posterior probability of each link, recomputed for these pairs with the tables of "
               f"checkpoint {ckpt.name if ckpt else '?'} (the one the output was decoded with); in a directional "
               "panel each column (forward) or row (reverse) sums to 1 together with the NULL word, which is not "
               "drawn. The symmetrized panel shades the mean of the two directions. Rings: the links chosen in the "
               "output.")
    parts.append(_note(problem) if problem else f"<p class=\"sub\">{_e(shading)}</p>")
    if not pairs:
        parts.append(_note("the output holds no trained pair to show"))
    symmetrization = view.config.get("symmetrization", "")
    key_col = id_column(view)
    for p in pairs:
        title = f"{key_col} {p.key}: {len(p.src_words)} source × {len(p.tgt_words)} target tokens"
        parts.append(f"<h3>{_e(title)}</h3>")
        if p.skip_reason is not None:
            parts.append(_note(f"not trained on ({p.skip_reason}): the output holds no alignment for it"))
            continue
        if not p.src_words or not p.tgt_words:
            continue
        counts = ", ".join(f"{name} {len(links)}" for name, links in p.links.items())
        parts.append(_img(figure_png(grid_figure(p, view.directions, symmetrization)), f"alignment grid {p.key}",
                          f"source: {' '.join(p.src_words)} | target: {' '.join(p.tgt_words)} | links: {counts}"))
    return "\n".join(parts)


MIN_SHOWN_PROB = 0.01


def lexicon_section(view: RunView, *, n_words: int, n_best: int) -> str:
    parts = ['<h2 id="lexicon">Top translations of frequent words</h2>']
    ckpt = view.final_checkpoint()
    if view.encoded is None or ckpt is None or "table" not in ckpt.manifest:
        return parts[0] + _note("no translation table has been committed yet")
    tops = top_translations(view, ckpt, n_words=n_words, n_best=n_best, min_prob=MIN_SHOWN_PROB)
    parts.append(f'<p class="sub">From checkpoint {_e(ckpt.name)} (stage {ckpt.stage_index + 1}); the '
                 f"{n_words} most frequent words of each side with up to {n_best} most probable translations "
                 f"(those with probability below {MIN_SHOWN_PROB} are not listed). Bars are proportional to the "
                 "probability.</p>")
    cols = []
    for side, title in (("source", "source word → t(target | source)"), ("target", "target word → t(source | target)")):
        if side not in tops:
            cols.append(f"<div><h3>{_e(title)}</h3>" + _note("this direction was not trained") + "</div>")
            continue
        body = []
        for word, count, trans in tops[side]:
            cells = "".join(f'<span class="tr"><b>{_e(w)}</b> {p:.3f}<span class="bar" '
                            f'style="width:{max(1, round(p * 60))}px"></span></span>' for w, p in trans)
            body.append(f'<tr><td>{_e(word)}</td><td class="num">{count:,}</td><td>{cells}</td></tr>')
        cols.append(f"<div><h3>{_e(title)}</h3><table><tr><th>word</th><th class=\"num\">count</th>"
                    f"<th>translations</th></tr>{''.join(body)}</table></div>")
    parts.append('<div class="cols">' + "".join(cols) + "</div>")
    return "\n".join(parts)


def scores_section(view: RunView) -> str:
    parts = ['<h2 id="scores">Pair scores</h2>']
    if view.output is None:
        return parts[0] + _note("no output yet: pair scores appear once output.json exists")
    scores = pair_scores(view)
    if not any(len(v) for v in scores.values()):
        return parts[0] + _note("the output holds no pair scores")
    parts.append(_img(figure_png(score_figure(scores)), "histogram of pair scores",
                      "Scores are log p(one side | other side) per generated word under the final model. Solid "
                      "outline with /// hatching: forward; dashed outline: reverse. Dotted vertical lines: the 5% and "
                      f"25% quantiles of score_{view.directions[0]}. Pairs far in the left tail are often noisy or "
                      "not translations of each other."))
    quantiles = (1, 5, 10, 25, 50)
    head = "".join(f'<th class="num">{q}%</th>' for q in quantiles)
    body = "".join(f"<tr><td>score_{d}</td>" + "".join(
        _cell(f"score_{d}.q{q}", float(np.percentile(v, q)), 3) for q in quantiles) + "</tr>"
        for d, v in scores.items() if len(v))
    parts.append("<h3>Thresholds</h3><p class=\"sub\">Keeping pairs whose score is at least the value in a column "
                 "drops that percentage of the trained pairs.</p>"
                 f"<table><tr><th>score</th>{head}</tr>{body}</table>")
    return "\n".join(parts)


def build_report(run_dir: str, *, n_pairs: int = 4, ids: Sequence[str] | None = None, n_words: int = 12,
                 n_best: int = 5, seed: int = 0) -> str:
    """The report of ``run_dir`` as one HTML string (images embedded)."""
    view = load_run(run_dir)
    rows = iteration_rows(view.checkpoints)
    stages = view.config.get("stages", [])
    n_planned = sum(int(s.get("n_iter", 0)) for s in stages)
    complete = view.output is not None
    status = ("complete" if complete else
              f"in progress or stopped: {len(rows)} of {n_planned} iterations committed, no output yet")
    stage_text = " → ".join(f"{s['model']} × {s['n_iter']}" for s in stages)
    sections = [summary_section(view, rows), convergence_section(view, rows),
                grids_section(view, n_pairs=n_pairs, ids=ids, seed=seed),
                lexicon_section(view, n_words=n_words, n_best=n_best), scores_section(view)]
    nav = "".join(f'<a href="#{a}">{t}</a>' for a, t in (("summary", "Summary"), ("convergence", "Convergence"),
                                                         ("alignments", "Alignments"), ("lexicon", "Translations"),
                                                         ("scores", "Pair scores")))
    generated = time.strftime("%Y-%m-%d %H:%M:%S UTC", time.gmtime())
    return (f'<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8">'
            f'<meta name="viewport" content="width=device-width, initial-scale=1">'
            f"<title>spark_align run report: {_e(view.store.url)}</title><style>{CSS}</style></head><body><main>"
            f"<h1>Alignment run report</h1>"
            f'<p class="sub"><code>{_e(view.store.url)}</code> · {_e(stage_text)} · {_e(", ".join(view.directions))}'
            f'</p><p><span class="status{"" if complete else " progress"}" data-key="status">{_e(status)}</span></p>'
            f"<nav>{nav}</nav>" + "\n".join(sections)
            + f"<footer>Written by spark-align report at {_e(generated)} from the run directory alone. Alignments "
              f"and lexicons are unsupervised statistical estimates: check them before relying on them.</footer>"
              f"</main></body></html>\n")


def write_report(run_dir: str, out: str | None = None, *, log: Callable[[str], None] | None = None,
                 **options) -> str:
    """Write the report (default ``RUN_DIR/report.html``); returns where it went."""
    text = build_report(run_dir, **options)
    store = RunStore(run_dir)
    if out is None:
        path, fs, shown = posixpath.join(store.root, "report.html"), store.fs, store.spark_path("report.html")
    else:
        import fsspec

        from spark_align.store import fsspec_url

        fs, path = fsspec.core.url_to_fs(fsspec_url(out))
        shown = out if "://" in out else os.path.abspath(out)
    try:
        parent = posixpath.dirname(path)
        if parent:
            fs.makedirs(parent, exist_ok=True)
        with fs.open(path, "w", encoding="utf-8") as fh:
            fh.write(text)
    except OSError as exc:
        raise ReportError(f"cannot write the report to {shown}: {exc.strerror or exc}") from None
    if log is not None:
        log(f"report: {shown}")
    return shown
