"""A whole training run: claim the run directory, ingest, train (or resume), write the output."""
from __future__ import annotations

import dataclasses
import posixpath
import time
from collections.abc import Callable

from spark_align.config import RunConfig
from spark_align.engine import em, ingest, output, shipping, tables
from spark_align.engine import gold as gold_mod
from spark_align.errors import CheckpointError, CheckpointMismatchError, InputError, RunDirError
from spark_align.fingerprint import corpus_fingerprint
from spark_align.store import FORMAT_VERSION, Checkpoint, RunStore


def _diff(old, new, prefix="") -> list[str]:
    if isinstance(old, dict) and isinstance(new, dict):
        out = []
        for key in sorted(set(old) | set(new)):
            out += _diff(old.get(key), new.get(key), f"{prefix}{key}.")
        return out
    return [] if old == new else [f"{prefix.rstrip('.')} was {old!r}, now {new!r}"]


def check_compatible(existing: dict, cfg: RunConfig, fingerprint: str, run_dir: str) -> None:
    """Refuse to resume with another corpus or an incompatible configuration, saying what differs."""
    if existing.get("format_version", 0) > FORMAT_VERSION:
        raise CheckpointError(f"{run_dir} was written by a newer spark_align (format "
                              f"{existing['format_version']} > {FORMAT_VERSION}); upgrade to resume it")
    if existing.get("corpus_fingerprint") != fingerprint:
        raise CheckpointMismatchError(f"{run_dir} was trained on a different corpus (fingerprint "
                                      f"{existing.get('corpus_fingerprint')}, this corpus {fingerprint})")
    old = RunConfig.from_dict(existing["config"]).training_key()
    diffs = _diff(old, cfg.training_key())
    if diffs:
        raise CheckpointMismatchError(f"{run_dir} has an incompatible configuration: {'; '.join(diffs[:5])}")


def verify_checkpoint(store: RunStore, ckpt: Checkpoint) -> str | None:
    """None if the checkpoint's table files match its manifest, else what is wrong."""
    if ckpt.manifest.get("format_version", 0) > FORMAT_VERSION:
        return f"manifest format {ckpt.manifest['format_version']} is newer than this version ({FORMAT_VERSION})"
    expected = ckpt.manifest.get("table", {}).get("files")
    if expected is None:
        return None if ckpt.iteration == 0 and "table" not in ckpt.manifest else "manifest lists no table files"
    rel = RunStore.checkpoint_dir(ckpt.stage_index, ckpt.model, ckpt.iteration)
    try:
        actual = store.files(rel, "lex")
    except FileNotFoundError:
        actual = {}
    if actual != expected:
        missing = sorted(set(expected) - set(actual))
        changed = sorted(k for k in expected if k in actual and actual[k] != expected[k])
        extra = sorted(set(actual) - set(expected))
        return (f"table files differ from the manifest (missing: {missing[:3]}, "
                f"wrong size: {changed[:3]}, unexpected: {extra[:3]})")
    crc = ckpt.manifest["table"].get("crc32")
    if crc is not None:
        got = store.checksums(rel, "lex")
        bad = sorted(k for k in crc if got.get(k) != crc[k])
        if bad:
            return f"table file {bad[0]} has CRC-32 {got.get(bad[0])}, the manifest says {crc[bad[0]]}"
    return None


def starting_state(store: RunStore, cfg: RunConfig, resume_from: str | None,
                   log: Callable[[str], None]) -> em.TrainState | None:
    """The newest intact checkpoint (or the one named by ``resume_from``); None = start fresh."""
    ckpts = store.checkpoints()
    for where, why in store.uncommitted_checkpoints():
        log(f"note: ignoring {where}: {why}")
    if resume_from is not None:
        model, _, it = resume_from.partition(":")
        chosen = [c for c in ckpts if c.model == model and str(c.iteration) == it.strip()]
        if not chosen:
            names = ", ".join(c.name for c in ckpts) or "none"
            raise CheckpointError(f"no committed checkpoint {resume_from!r} (committed: {names})")
        ckpt = chosen[0]
        problem = verify_checkpoint(store, ckpt)
        if problem:
            raise CheckpointError(f"checkpoint {ckpt.name} is damaged: {problem}")
        later = [RunStore.checkpoint_dir(c.stage_index, c.model, c.iteration)
                 for c in ckpts if (c.stage_index, c.iteration) > (ckpt.stage_index, ckpt.iteration)]
        for rel in later:  # un-commit them all first: a crash in between leaves no later commit behind
            store.remove(rel, "manifest.json")
        for rel in later:
            store.remove(rel)
        log(f"resuming from checkpoint {ckpt.name}; later checkpoints removed")
        return _state_of(store, ckpt)
    for ckpt in reversed(ckpts):
        if ckpt.stage_index >= len(cfg.stages) or cfg.stages[ckpt.stage_index].model != ckpt.model:
            continue
        problem = verify_checkpoint(store, ckpt)
        if problem is None:
            log(f"resuming after checkpoint {ckpt.name} (stage {ckpt.stage_index + 1})")
            return _state_of(store, ckpt)
        log(f"warning: checkpoint {ckpt.name} is damaged ({problem}); falling back to an earlier one")
    return None


def _state_of(store: RunStore, ckpt: Checkpoint) -> em.TrainState:
    rel = RunStore.checkpoint_dir(ckpt.stage_index, ckpt.model, ckpt.iteration)
    table = store.spark_path(rel, "lex") if "table" in ckpt.manifest else None
    return em.TrainState(ckpt.stage_index, ckpt.iteration, table, em.dense_from_json(ckpt.manifest.get("dense", {})))


def train(spark, cfg: RunConfig, run_dir: str, *, resume: bool = False, resume_from: str | None = None,
          log: Callable[[str], None] = print, gold: str | None = None, gold_id_column: str | None = None,
          run_info: dict | None = None) -> dict:
    """Train ``cfg`` in ``run_dir``; returns the output manifest (with the run summary).

    ``run_info`` (how the run was launched: the ``--config`` file, the Spark master and profile)
    goes into ``run.json`` when the run is created and into ``output.json``.

    ``gold`` (a gold alignment file, see ``engine.gold``) adds precision, recall, F1 and AER on the
    gold pairs to every iteration's progress line and manifest (``metrics.gold``).
    """
    started = time.time()
    store = RunStore(run_dir)
    continuing = resume or resume_from is not None
    existing = store.read_json("run.json")
    if existing is not None and not continuing:
        raise RunDirError(f"{store.url} already holds a run; add --resume to continue it, "
                          f"or choose a new --run directory")
    if existing is None and continuing and store.exists():
        if store.checkpoints() or store.exists("corpus"):
            raise RunDirError(f"{store.url} has no run.json: it is not a spark_align run directory")
    had_dir = store.exists()
    ingest.validate(spark, cfg)
    gold_set = gold_mod.load_gold(gold, cfg.corpus, id_column=gold_id_column) if gold else None
    fingerprint = corpus_fingerprint(spark, cfg.corpus)
    if existing is not None:
        check_compatible(existing, cfg, fingerprint, store.url)
    else:
        # A crash while claiming the directory leaves only a temporary run.json: still ours to claim.
        if store.exists() and [p for p in store.fs.ls(store.root, detail=False)
                               if not posixpath.basename(p.rstrip("/")).startswith("run.json.tmp-")]:
            raise RunDirError(f"{store.url} is not empty and holds no run; choose an empty or new directory")
        store.check_writable()
        store.write_json("run.json", {"format_version": FORMAT_VERSION, "config": cfg.to_dict(),
                                      "corpus_fingerprint": fingerprint, **(run_info or {}),
                                      "created_at": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime())})
    encoded = store.read_json("encoded.json")
    if encoded is None:
        log(f"ingesting {cfg.corpus.path or cfg.corpus.source_text} ...")
        try:
            summary = ingest.ingest(spark, cfg, store)
        except InputError:
            if existing is None:  # this call claimed the directory: leave nothing of the attempt behind
                for path in store.fs.ls(store.root, detail=False):
                    store.fs.rm(path, recursive=True)
                if not had_dir:
                    store.fs.rmdir(store.root)
            raise
        encoded = dataclasses.asdict(summary)
        if cfg.corpus.id_column:
            encoded["duplicate_ids"] = count_duplicate_ids(spark, store, cfg.corpus.id_column)
        store.write_json("encoded.json", {**encoded, "corpus_fingerprint": fingerprint})
    log(summary_line(encoded))
    if encoded.get("duplicate_ids"):
        log(f"warning: {encoded['duplicate_ids']} row(s) repeat a value of id column {cfg.corpus.id_column!r}; "
            f"ids are only carried to the output (rows are identified by _row), so nothing is merged")
    monitor = gold_mod.GoldMonitor.build(spark, cfg, store, gold_set, log) if gold_set else None
    trainer = em.Trainer(spark, cfg, store, encoded, fingerprint=fingerprint, log=log, gold=monitor)
    state = starting_state(store, cfg, resume_from, log) if continuing else None
    if state is None:
        state = em.TrainState(0, 0, None, {})
        if cfg.init == "random":
            state = _random_init(spark, cfg, store, trainer, encoded)
    try:
        state = trainer.train(state)
    finally:
        if monitor is not None:
            monitor.close()
    last = cfg.stages[state.stage_index]
    model = last.build()
    src_v, tgt_v = encoded["src_vocab_size"], encoded["tgt_vocab_size"]
    # Each Python worker reads the final table itself (the driver never holds it), unless the table is
    # one the E-step would ship per unit: then each decoding task gets its units' entries the same way.
    tables_bc = tables.table_source(state.table_path, cfg.direction_list, src_v, tgt_v)
    n_entries = None if state.table_path is None else shipping.table_entries(spark, state.table_path)
    try:
        decoder = output.make_decoder(model, cfg.direction_list, tables_bc, state.dense, method=cfg.decoding,
                                      threshold=cfg.posterior_threshold, symmetrization=cfg.symmetrization)
        decoded = None
        if shipping.choose_shipping(cfg.shipping, n_entries, cfg.table_budget_mb) == "join":
            decoded = shipping.decode_routed(spark, store, state.table_path, decoder, n_buckets=trainer.n_reducers())
        manifest = output.write_output(
            spark, store, decoder, checkpoint=f"{last.model}:{state.iteration}",
            directions=cfg.direction_list, decoded=decoded,
            extra={"config": cfg.to_dict(), "corpus_fingerprint": fingerprint, "summary": encoded,
                   "stage_index": state.stage_index, **(run_info or {})})
        store.remove(shipping.DECODED)
    finally:
        tables_bc.unpersist()
    log(f"output: {store.spark_path('output')} ({manifest['rows']} rows, {manifest['aligned']} aligned, "
        f"{manifest['skipped']} skipped); total {time.time() - started:.1f}s")
    return manifest


def count_duplicate_ids(spark, store: RunStore, column: str) -> int:
    """Rows whose id value (null included) an earlier row already has: one aggregation over the snapshot."""
    from pyspark.sql import functions as F

    counts = spark.read.parquet(store.spark_path("corpus")).groupBy(column).count()
    extra = counts.filter(F.col("count") > 1).agg(F.sum(F.col("count") - 1)).collect()[0][0]
    return int(extra or 0)


def summary_line(encoded: dict) -> str:
    skipped = ", ".join(f"{k} {v}" for k, v in sorted(encoded["skipped"].items())) or "none"
    return (f"corpus: {encoded['n_rows']} pairs, {encoded['n_kept']} kept (skipped: {skipped}); "
            f"{encoded['n_src_tokens']} source / {encoded['n_tgt_tokens']} target tokens; vocabulary "
            f"{encoded['src_vocab_size']} source / {encoded['tgt_vocab_size']} target words; "
            f"{encoded['n_blocks']} blocks")


def _random_init(spark, cfg: RunConfig, store: RunStore, trainer: em.Trainer, encoded: dict) -> em.TrainState:
    stage = cfg.stages[0]
    rel = RunStore.checkpoint_dir(0, stage.model, 0)
    table = em.init_table(spark, trainer.blocks(), cfg.direction_list, cfg.init, cfg.seed,
                          encoded["src_vocab_size"], encoded["tgt_vocab_size"])
    table.write.mode("overwrite").parquet(store.spark_path(rel, "lex"))
    model = stage.build()
    dense = {d: model.init_dense(None) for d in cfg.direction_list}
    store.write_json(f"{rel}/manifest.json", {
        "format_version": FORMAT_VERSION, "stage_index": 0, "stage": stage.model, "iteration": 0,
        "init": cfg.init, "seed": cfg.seed, "dense": em.dense_to_json(dense),
        "table": {"path": "lex", "files": store.files(rel, "lex"), "crc32": store.checksums(rel, "lex")},
        "config": cfg.to_dict()})
    return em.TrainState(0, 0, store.spark_path(rel, "lex"), dense)
