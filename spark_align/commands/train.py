"""``spark-align train``."""
from __future__ import annotations

import argparse

from spark_align import profiles
from spark_align.commands import common
from spark_align.config import (DECODINGS, DIRECTIONS, INITS, SHIPPINGS, SYMMETRIZATIONS, RunConfig,
                                parse_model_options, parse_stages)
from spark_align.errors import ConfigError

DEFAULT_STAGES = "ibm1:5,hmm:5"
NAME = "train"
HELP = "train alignment models on a corpus and write aligned output"
DESCRIPTION = ("Train the stages on a parallel corpus. Sentences are pre-tokenized text: tokens are split on "
               "whitespace. Everything is written under --run.")


def _model_names() -> str:
    from spark_align.models import MODELS

    return ", ".join(sorted(MODELS))


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("--config", metavar="FILE",
                   help="a TOML run file holding the whole run (corpus, stages, directions, decoding, output, "
                        "Spark profile; see conf/runs/example.toml); options given here override it. Its text "
                        "is recorded in run.json")
    common.add_corpus_options(p)
    common.add_filter_options(p)
    g = p.add_argument_group("training")
    g.add_argument("--run", required=True, metavar="RUN_DIR",
                   help="run directory (local path or URL) that receives vocabularies, checkpoints and output")
    g.add_argument("--stages", default=DEFAULT_STAGES,
                   help=f"models and iterations, in order, as NAME:N,NAME:N (default {DEFAULT_STAGES}); each stage starts "
                        f"from the previous stage's translation table. Models: {_model_names()}")
    g.add_argument("--model-option", action="append", default=[], metavar="MODEL.OPTION=VALUE",
                   help="a model option, repeatable: hmm.p_null (NULL transition probability, default 0.2), "
                        "hmm.max_jump (jumps beyond share a bucket, default 7), ibm2.max_length_cap (default 20), "
                        "ibm2diag.p_null (0.08), ibm2diag.init_lambda (tension, 4.0), ibm2diag.learn_lambda "
                        "(true), ibm2diag.max_length_cap (30)")
    g.add_argument("--directions", choices=DIRECTIONS, default="both",
                   help="forward = p(target | source), reverse = p(source | target), both = train both and "
                        "combine their alignments (default both)")
    g.add_argument("--init", choices=INITS, default="uniform",
                   help="initial translation table: uniform (default) or random (seeded by --seed)")
    g.add_argument("--seed", type=int, default=0, help="seed for --init random (default 0)")
    g.add_argument("--block-size", type=int, default=2048,
                   help="sentence pairs per encoded block, the unit of work of an E-step (default 2048; larger "
                        "blocks share more of their pair dictionaries, so fewer count rows leave each E-step)")
    g.add_argument("--decoding", choices=DECODINGS, default="viterbi",
                   help="viterbi: the single best alignment (default); posterior: every link whose posterior "
                        "is at least --posterior-threshold")
    g.add_argument("--posterior-threshold", type=float, default=0.5,
                   help="threshold for --decoding posterior and --symmetrization posterior (default 0.5)")
    g.add_argument("--symmetrization", choices=SYMMETRIZATIONS, default="grow-diag-final-and",
                   help="how --directions both combines the two alignments (default grow-diag-final-and)")
    g.add_argument("--shipping", choices=SHIPPINGS, default="auto",
                   help="how each E-step task gets the translation table: broadcast (the whole table to every "
                        "task), join (each task gets only the word pairs of its blocks, routed to it through Spark's "
                        "shuffle), or "
                        "auto (default): broadcast while the table takes at most --table-budget-mb, else join. "
                        "Results are identical")
    g.add_argument("--table-budget-mb", type=float, default=768.0, metavar="MB",
                   help="largest table that --shipping auto gives whole to every Python worker, counted at 48 "
                        "bytes per entry (table, count accumulators, bucket order; default 768)")
    g.add_argument("--prune-below", type=float, default=None, metavar="P",
                   help="after each iteration drop translation probabilities below P (they count as 1e-12); "
                        "smaller tables, slightly different results; off by default")
    g.add_argument("--resume", action="store_true",
                   help="continue the run in RUN_DIR from its last intact checkpoint")
    g.add_argument("--resume-from", metavar="MODEL:ITERATION",
                   help="continue from a given committed checkpoint (later ones are removed)")
    g.add_argument("--gold", metavar="PATH",
                   help="gold alignments of some corpus pairs (text: one line per corpus line with 'i-j' sure and "
                        "'i?j' possible links; or Parquet with a key column and 'sure'/'possible' link lists): "
                        "precision, recall, F1 and AER on them after every iteration, in the progress line and "
                        "the manifest")
    g.add_argument("--gold-id-column", metavar="NAME",
                   help="key column of a Parquet --gold file (default: --id-column for a Parquet corpus, "
                        "'line' for a text corpus)")
    g.add_argument("--log-json", metavar="FILE",
                   help="also append progress as JSON lines to FILE (one object per iteration with the figures "
                        "of the progress line, plus start, done and error records), for dashboards")
    common.add_spark_options(p)
    profiles.defer_defaults(p)


def config_from_args(args: argparse.Namespace) -> RunConfig:
    stages = parse_stages(args.stages, parse_model_options(args.model_option))
    return RunConfig(corpus=common.corpus_config(args), stages=stages,
                     directions=args.directions, init=args.init, seed=args.seed, block_size=args.block_size,
                     decoding=args.decoding, posterior_threshold=args.posterior_threshold,
                     symmetrization=args.symmetrization, shipping=args.shipping,
                     table_budget_mb=args.table_budget_mb, prune_below=args.prune_below)


def run(args: argparse.Namespace) -> int:
    from spark_align.engine.run import train
    from spark_align.store import RunStore

    config_file = profiles.apply_run_file(args)
    log = common.ProgressLog(args.log_json)
    try:
        cfg = config_from_args(args)
        if args.resume and args.resume_from:
            raise ConfigError("use either --resume or --resume-from, not both")
        profile = profiles.load_profile(args.profile) if args.profile else None
        spark = common.session(args)
        run_info = {"spark": {"master": spark.sparkContext.master, "profile": profile.to_dict() if profile else None,
                              "conf": profiles.redact(common.conf_pairs(args.conf))}}
        if config_file is not None:
            run_info["config_file"] = config_file
        log.event({"event": "start", "run": args.run, "master": spark.sparkContext.master,
                   "application_id": spark.sparkContext.applicationId,
                   "config_file": config_file["path"] if config_file else None, "config": cfg.to_dict()})
        manifest = train(spark, cfg, args.run, resume=args.resume, resume_from=args.resume_from, log=log,
                         gold=args.gold, gold_id_column=args.gold_id_column, run_info=run_info)
        log.event({"event": "done", "run": args.run, "output": RunStore(args.run).spark_path("output"),
                   **{k: manifest.get(k) for k in ("rows", "aligned", "skipped", "checkpoint")}})
    except BaseException as exc:  # recorded for the dashboard, then handled by the CLI as usual
        log.event({"event": "error", "run": args.run, "error": type(exc).__name__,
                   "message": (str(exc).strip().splitlines() or [""])[0]})
        raise
    finally:
        log.close()
    return 0
