"""Aligning a new corpus with the frozen tables of a run, without training.

A finished or still-running run directory holds everything decoding needs:
its configuration (``run.json``: tokenization, lowercasing, length filters,
block size, directions, decoding, symmetrization), its vocabularies and its
committed checkpoints. :func:`align_corpus` reads the new corpus with the
run's settings, encodes it with the run's vocabularies, decodes it with
``engine.output.make_decoder`` and writes the same output columns as training.

Costs and invariants:

* Three passes over the new corpus: snapshot (plus the input checks of
  training), tokens + encoding to blocks, decoding. The vocabularies are
  broadcast as hash indexes (about 100 bytes per word per Python worker) and
  the checkpoint table is broadcast as sorted arrays (16 bytes per entry per
  Python worker; see ``engine.tables``), exactly as in training.
* Unknown words (never seen in training, or only in filtered pairs) get one
  extra id per side: ``V + 1`` where ``V`` is that side's vocabulary size.
  The tables then know nothing about them, which the fallback below turns
  into a definite, documented behaviour instead of an error.
* The output directory is claimed with ``align.json`` first and committed by
  ``output.json`` last (written by ``engine.output.write_output``); the
  intermediate ``corpus/`` and ``encoded/`` folders are removed after the commit.

Unknown-word fallback (our choice, no source): t(unknown | NULL) =
1 / (V + 1), where V is the vocabulary size of the unknown word's side (a
uniform guess over the vocabulary plus the unknown word); every other
probability involving an unknown word is the table floor 1e-12 (the same floor
the M-step applies, ``engine.tables.MIN_PROB``). So an unknown word is linked
to NULL (left unaligned) in its generating direction, and is chosen as the
partner of a known word only when no known word of the sentence has a table
entry for it either. Pairs of known words that never co-occurred in training
also get the floor.
"""
from __future__ import annotations

import dataclasses
import time
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from spark_align.config import CorpusConfig, RunConfig
from spark_align.engine import ingest, output, tables
from spark_align.engine import shipping as shipping_mod
from spark_align.engine.em import n_reducers
from spark_align.errors import CheckpointError, ConfigError, RunDirError
from spark_align.kernels import ragged
from spark_align.store import FORMAT_VERSION, Checkpoint, RunStore

ALIGN_MARKER = "align.json"


@dataclass(frozen=True)
class TrainedRun:
    """A run directory opened for reading: its store, configuration and ingestion summary."""

    store: RunStore
    config: RunConfig
    encoded: dict


def open_run(run_dir: str) -> TrainedRun:
    """Open a run directory for reading; one-line errors when it is not a usable run."""
    store = RunStore(run_dir)
    meta = store.read_json("run.json")
    if meta is None:
        raise RunDirError(f"{store.url} has no run.json: it is not a spark_align run directory")
    if meta.get("format_version", 0) > FORMAT_VERSION:
        raise CheckpointError(f"{store.url} was written by a newer spark_align (format "
                              f"{meta['format_version']} > {FORMAT_VERSION})")
    encoded = store.read_json("encoded.json")
    if encoded is None:
        raise CheckpointError(f"{store.url} has not finished ingesting its corpus yet (no encoded.json)")
    return TrainedRun(store, RunConfig.from_dict(meta["config"]), encoded)


def parse_checkpoint(spec: str) -> tuple[str, int]:
    """``MODEL:ITERATION`` -> (model, iteration); ConfigError naming the bad value."""
    model, sep, it = spec.partition(":")
    if not sep or not model.strip() or not it.strip().isdigit():
        raise ConfigError(f"--checkpoint takes MODEL:ITERATION (for example hmm:5), got {spec!r}")
    return model.strip(), int(it)


def resolve_checkpoint(run: TrainedRun, spec: str | None, log: Callable[[str], None] = print) -> Checkpoint:
    """The checkpoint to read: ``spec``, else the one the output was decoded with, else the newest.

    When a model appears in several stages, ``MODEL:ITERATION`` names the latest
    stage's. Damaged checkpoints (files differ from the manifest) are refused.
    """
    from spark_align.engine.run import verify_checkpoint

    ckpts = run.store.checkpoints()
    if not ckpts:
        raise CheckpointError(f"{run.store.url} has no committed checkpoint yet")
    if spec is not None:
        model, iteration = parse_checkpoint(spec)
        chosen = [c for c in ckpts if c.model == model and c.iteration == iteration]
        if not chosen:
            names = ", ".join(c.name for c in ckpts)
            raise CheckpointError(f"{run.store.url} has no committed checkpoint {spec!r} (committed: {names})")
        ckpt = chosen[-1]
    else:
        done = run.store.read_json("output.json") or {}
        chosen = [c for c in ckpts if c.name == done.get("checkpoint")
                  and c.stage_index == done.get("stage_index", c.stage_index)]
        if chosen:
            ckpt = chosen[-1]
        else:
            ckpt = ckpts[-1]
            log(f"using the newest committed checkpoint {ckpt.name} (the run has no committed output)"
                if not done else f"the output's checkpoint {done.get('checkpoint')} is gone; "
                                 f"using the newest committed checkpoint {ckpt.name}")
    problem = verify_checkpoint(run.store, ckpt)
    if problem:
        raise CheckpointError(f"checkpoint {ckpt.name} of {run.store.url} is damaged: {problem}")
    return ckpt


def checkpoint_model(run: TrainedRun, ckpt: Checkpoint):
    """(model, dense parameters per direction) of a checkpoint."""
    from spark_align.engine.em import dense_from_json

    cfg = RunConfig.from_dict(ckpt.manifest["config"]) if "config" in ckpt.manifest else run.config
    model = cfg.stages[ckpt.stage_index].build()
    dense = dense_from_json(ckpt.manifest.get("dense", {}))
    return model, {d: dense.get(d, model.init_dense(None)) for d in run.config.direction_list}


def checkpoint_table_path(run: TrainedRun, ckpt: Checkpoint) -> str | None:
    """Where the checkpoint's table is (None: it has none, the uniform start)."""
    if "table" not in ckpt.manifest:
        return None
    return run.store.spark_path(RunStore.checkpoint_dir(ckpt.stage_index, ckpt.model, ckpt.iteration), "lex")


def checkpoint_tables(spark, run: TrainedRun, ckpt: Checkpoint) -> dict[str, tables.DirectionTable]:
    """The checkpoint's translation tables as broadcastable arrays (uniform if it has none)."""
    directions = run.config.direction_list
    path = checkpoint_table_path(run, ckpt)
    if path is None:
        return tables.uniform_tables(directions, run.encoded["src_vocab_size"], run.encoded["tgt_vocab_size"])
    return tables.read_tables(spark, path, directions)


def unknown_ids(src_vocab_size: int, tgt_vocab_size: int) -> tuple[int, int]:
    """Ids given to words missing from the vocabularies: one past the largest id of each side."""
    return src_vocab_size + 1, tgt_vocab_size + 1


def unknown_entries(src_vocab_size: int, tgt_vocab_size: int) -> dict[str, tuple[np.ndarray, float]]:
    """direction -> (key, probability) of its one entry for an unknown word: t(unknown | NULL) = 1 / (V + 1)
    (see the module docstring)."""
    src_unk, tgt_unk = unknown_ids(src_vocab_size, tgt_vocab_size)
    return {"forward": (ragged.make_key(np.array([ragged.NULL_ID]), np.array([tgt_unk])), 1.0 / (tgt_vocab_size + 1)),
            "reverse": (ragged.make_key(np.array([src_unk]), np.array([ragged.NULL_ID])), 1.0 / (src_vocab_size + 1))}


def with_unknown_words(tabs: dict[str, tables.DirectionTable], src_vocab_size: int,
                       tgt_vocab_size: int) -> dict[str, tables.DirectionTable]:
    """Add t(unknown | NULL) = 1 / (V + 1) to each direction (see the module docstring).

    Everything else involving an unknown word is absent, so lookups give the floor.
    """
    extra = unknown_entries(src_vocab_size, tgt_vocab_size)
    out = {}
    for direction, table in tabs.items():
        if table.constant is not None:  # a uniform table already covers every word
            out[direction] = table
            continue
        key, prob = extra[direction]
        keys = np.concatenate([table.keys, key])
        probs = np.concatenate([table.probs, [prob]])
        order = np.argsort(keys, kind="stable")
        out[direction] = tables.DirectionTable(keys[order], probs[order])
    return out


def run_corpus_config(run_cfg: RunConfig, corpus: CorpusConfig) -> CorpusConfig:
    """``corpus`` read with the run's tokenization, lowercasing and length filters."""
    c = run_cfg.corpus
    return dataclasses.replace(corpus, lowercase=c.lowercase, max_length=c.max_length, max_ratio=c.max_ratio)


def _claim(out: RunStore, overwrite: bool) -> None:
    if out.exists(ALIGN_MARKER):
        if not overwrite:
            raise RunDirError(f"{out.url} already holds aligned output; add --overwrite to replace it, "
                              f"or choose a new --out directory")
        for path in out.fs.ls(out.root, detail=False):
            out.fs.rm(path, recursive=True)
    elif out.exists() and out.fs.ls(out.root):
        raise RunDirError(f"{out.url} is not empty and holds no aligned output; choose an empty or new --out "
                          f"directory")
    out.check_writable()


def align_corpus(spark, run_dir: str, corpus: CorpusConfig, out_dir: str, *, checkpoint: str | None = None,
                 decoding: str | None = None, symmetrization: str | None = None,
                 posterior_threshold: float | None = None, shipping: str | None = None, overwrite: bool = False,
                 log: Callable[[str], None] = print) -> dict:
    """Align ``corpus`` with the tables of a checkpoint of ``run_dir``; write ``out_dir``.

    ``corpus`` says where the new pairs are (path or text files, column names);
    its tokenization and filter settings are replaced by the run's. Decoding
    settings and the shipping of the table to the decoding tasks default to the run's (per-unit
    shipping: ``engine.shipping.decode_routed``, with the unknown words' entries added per unit;
    the driver then never reads the table). Returns the output manifest.
    """
    from pyspark.sql import functions as F

    started = time.time()
    run = open_run(run_dir)
    out = RunStore(out_dir)
    if out.url == run.store.url or out.exists("run.json"):
        raise RunDirError(f"--out {out.url} is a run directory; choose a new directory for the aligned output")
    overrides = {k: v for k, v in (("decoding", decoding), ("symmetrization", symmetrization),
                                   ("posterior_threshold", posterior_threshold), ("shipping", shipping))
                 if v is not None}
    cfg = dataclasses.replace(run.config, corpus=run_corpus_config(run.config, corpus), **overrides)
    ckpt = resolve_checkpoint(run, checkpoint, log)
    model, dense = checkpoint_model(run, ckpt)
    ingest.validate(spark, cfg)
    _claim(out, overwrite)
    out.write_json(ALIGN_MARKER, {"format_version": FORMAT_VERSION, "run": run.store.url,
                                  "checkpoint": ckpt.name, "stage_index": ckpt.stage_index,
                                  "config": cfg.to_dict(),
                                  "created_at": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime())})
    log(f"aligning {cfg.corpus.path or cfg.corpus.source_text} with checkpoint {ckpt.name} of {run.store.url}")
    n_rows = ingest.snapshot(spark, cfg, out)
    src_v, tgt_v = run.encoded["src_vocab_size"], run.encoded["tgt_vocab_size"]
    tokens = ingest.tokens_frame(spark, cfg, out).persist()
    try:
        (tokens.filter(F.col("skip_reason").isNotNull()).select(ingest.ROW, "skip_reason")
         .write.mode("overwrite").parquet(out.spark_path("encoded", "skipped")))
        unknown = _count_unknown(spark, tokens, run.store)
        src_index, _ = ingest.load_vocab_index(spark, run.store.spark_path("vocab", "source"))
        tgt_index, _ = ingest.load_vocab_index(spark, run.store.spark_path("vocab", "target"))
        blocks = ingest.encode_blocks(spark, tokens, src_index, tgt_index, cfg.block_size,
                                      unknown_ids=unknown_ids(src_v, tgt_v))
        ingest.write_blocks(blocks, out.spark_path("encoded", "blocks"), cfg.block_size)
    finally:
        tokens.unpersist()
    table_path = checkpoint_table_path(run, ckpt)
    n_entries = None if table_path is None else shipping_mod.table_entries(spark, table_path)
    routed = shipping_mod.choose_shipping(cfg.shipping, n_entries, cfg.table_budget_mb) == "join"
    # per unit: nothing table-sized on the driver or in any Python worker; else the table broadcast
    tables_bc = (tables.Held(None) if routed else
                 spark.sparkContext.broadcast(with_unknown_words(checkpoint_tables(spark, run, ckpt), src_v, tgt_v)))
    try:
        decoder = output.make_decoder(model, cfg.direction_list, tables_bc, dense, method=cfg.decoding,
                                      threshold=cfg.posterior_threshold, symmetrization=cfg.symmetrization)
        decoded = None
        if routed:
            decoded = shipping_mod.decode_routed(spark, out, table_path, decoder, n_buckets=n_reducers(spark),
                                                 extra=unknown_entries(src_v, tgt_v))
        manifest = output.write_output(
            spark, out, decoder, checkpoint=ckpt.name, directions=cfg.direction_list, decoded=decoded,
            extra={"kind": "align", "run": run.store.url, "stage_index": ckpt.stage_index,
                   "config": cfg.to_dict(), "n_input_rows": n_rows, "unknown_tokens": unknown})
    finally:
        if not routed:
            tables_bc.unpersist()
    out.remove(shipping_mod.DECODED)
    out.remove("encoded")
    out.remove("corpus")
    log(f"aligned output: {out.spark_path('output')} ({manifest['rows']} rows, {manifest['aligned']} aligned, "
        f"{manifest['skipped']} skipped; unknown tokens: {unknown['source']} source, {unknown['target']} target); "
        f"{time.time() - started:.1f}s")
    return manifest


def _count_unknown(spark, tokens, run_store: RunStore) -> dict[str, int]:
    """Tokens of kept pairs whose word is missing from the run's vocabulary, per side."""
    from pyspark.sql import functions as F

    kept = tokens.filter(F.col("skip_reason").isNull())
    counts = {}
    for side, column in (("source", "src"), ("target", "tgt")):
        vocab = spark.read.parquet(run_store.spark_path("vocab", side)).select("word")
        words = kept.select(F.explode(column).alias("word"))
        counts[side] = words.join(vocab, "word", "left_anti").count()
    return counts
