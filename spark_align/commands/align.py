"""``spark-align align``."""
from __future__ import annotations

import argparse

from spark_align.commands import common
from spark_align.config import DECODINGS, SHIPPINGS, SYMMETRIZATIONS

NAME = "align"
HELP = "align a new corpus with the frozen tables of a trained run (no training)"
DESCRIPTION = ("Align a new parallel corpus with the translation tables of a run's checkpoint, without training. "
               "The run's tokenization, lowercasing and length filters are reused; words never seen in training "
               "are left unaligned (see the README). Writes the same output columns as training to --out.")


def add_arguments(p: argparse.ArgumentParser) -> None:
    common.add_corpus_options(p)
    g = p.add_argument_group("aligning")
    g.add_argument("--run", required=True, metavar="RUN_DIR", help="the trained run whose tables are used")
    g.add_argument("--out", required=True, metavar="DIR",
                   help="folder for the aligned corpus (output/ and output.json, written last)")
    g.add_argument("--checkpoint", metavar="MODEL:ITERATION",
                   help="which committed checkpoint (default: the one the run's output was decoded with, else the "
                        "newest)")
    g.add_argument("--decoding", choices=DECODINGS, help="as in train (default: the run's)")
    g.add_argument("--symmetrization", choices=SYMMETRIZATIONS, help="as in train (default: the run's)")
    g.add_argument("--posterior-threshold", type=float, help="as in train (default: the run's)")
    g.add_argument("--shipping", choices=SHIPPINGS,
                   help="as in train, for the decoding tasks (default: the run's; the size rule uses the run's "
                        "--table-budget-mb)")
    g.add_argument("--overwrite", action="store_true", help="replace an earlier aligned output in --out")
    common.add_spark_options(p)


def run(args: argparse.Namespace) -> int:
    from spark_align.engine.align import align_corpus, parse_checkpoint

    corpus = common.corpus_config(args)
    if args.checkpoint is not None:
        parse_checkpoint(args.checkpoint)
    align_corpus(common.session(args), args.run, corpus, args.out, checkpoint=args.checkpoint,
                 decoding=args.decoding, symmetrization=args.symmetrization,
                 posterior_threshold=args.posterior_threshold, shipping=args.shipping, overwrite=args.overwrite,
                 log=common.printer)
    return 0
