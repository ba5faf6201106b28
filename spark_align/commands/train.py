"""``spark-align train``."""
from __future__ import annotations

import argparse

from spark_align.commands import common
from spark_align.config import DECODINGS, DIRECTIONS, INITS, SYMMETRIZATIONS, RunConfig, parse_stages
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
    common.add_corpus_options(p)
    common.add_filter_options(p)
    g = p.add_argument_group("training")
    g.add_argument("--run", required=True, metavar="RUN_DIR",
                   help="run directory (local path or URL) that receives vocabularies, checkpoints and output")
    g.add_argument("--stages", default=DEFAULT_STAGES,
                   help=f"models and iterations, in order, as NAME:N,NAME:N (default {DEFAULT_STAGES}); each stage starts "
                        f"from the previous stage's translation table. Models: {_model_names()}")
    g.add_argument("--directions", choices=DIRECTIONS, default="both",
                   help="forward = p(target | source), reverse = p(source | target), both = train both and "
                        "combine their alignments (default both)")
    g.add_argument("--init", choices=INITS, default="uniform",
                   help="initial translation table: uniform (default) or random (seeded by --seed)")
    g.add_argument("--seed", type=int, default=0, help="seed for --init random (default 0)")
    g.add_argument("--block-size", type=int, default=512,
                   help="sentence pairs per encoded block, the unit of work of an E-step (default 512)")
    g.add_argument("--decoding", choices=DECODINGS, default="viterbi",
                   help="viterbi: the single best alignment (default); posterior: every link whose posterior "
                        "is at least --posterior-threshold")
    g.add_argument("--posterior-threshold", type=float, default=0.5,
                   help="threshold for --decoding posterior and --symmetrization posterior (default 0.5)")
    g.add_argument("--symmetrization", choices=SYMMETRIZATIONS, default="grow-diag-final-and",
                   help="how --directions both combines the two alignments (default grow-diag-final-and)")
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
    common.add_spark_options(p)


def config_from_args(args: argparse.Namespace) -> RunConfig:
    return RunConfig(corpus=common.corpus_config(args), stages=parse_stages(args.stages),
                     directions=args.directions, init=args.init, seed=args.seed, block_size=args.block_size,
                     decoding=args.decoding, posterior_threshold=args.posterior_threshold,
                     symmetrization=args.symmetrization)


def run(args: argparse.Namespace) -> int:
    from spark_align.engine.run import train

    cfg = config_from_args(args)
    if args.resume and args.resume_from:
        raise ConfigError("use either --resume or --resume-from, not both")
    train(common.session(args), cfg, args.run, resume=args.resume, resume_from=args.resume_from,
          log=common.printer, gold=args.gold, gold_id_column=args.gold_id_column)
    return 0
