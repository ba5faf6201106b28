"""``spark-align demo``."""
from __future__ import annotations

import argparse

from spark_align.commands import common
from spark_align.config import DIRECTIONS, parse_stages

NAME = "demo"
HELP = "generate a small demo corpus, train on it in local mode, show results"
DESCRIPTION = ("Generate a deterministic demo corpus of invented sentence pairs, train on it in local mode and "
               "print where the outputs are and a few alignments.")
DEMO_STAGES = "ibm1:5,hmm:5"


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("--dir", default="spark-align-demo", metavar="DIR",
                   help="folder for the demo corpus (DIR/corpus) and run (DIR/run); default ./spark-align-demo, "
                        "replaced if it holds an earlier demo")
    p.add_argument("--pairs", type=int, default=3000, help="number of generated sentence pairs (default 3000)")
    p.add_argument("--stages", default=DEMO_STAGES, help=f"stages as in train (default {DEMO_STAGES})")
    p.add_argument("--directions", choices=DIRECTIONS, default="both", help="as in train (default both)")
    common.add_spark_options(p)


def run(args: argparse.Namespace) -> int:
    from spark_align.demo import run_demo

    parse_stages(args.stages)
    run_demo(common.session(args), demo_dir=args.dir, n_pairs=args.pairs, stages=args.stages,
             directions=args.directions, log=common.printer)
    return 0
