"""``spark-align report``."""
from __future__ import annotations

import argparse

from spark_align.commands import common
from spark_align.errors import ConfigError

NAME = "report"
HELP = "write an HTML report of a run: summary, convergence plots, alignment grids, top translations"
DESCRIPTION = ("Write one self-contained HTML file (images embedded, viewable offline) describing a run directory: "
               "corpus and configuration summary, log-likelihood and perplexity per iteration, alignment grids of "
               "sample pairs, top translations of frequent words and a histogram of pair scores. Reads only the run "
               "directory (no Spark, no retraining); works on a run in progress. Needs matplotlib "
               "(pip install 'spark_align[report]').")


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("--run", required=True, metavar="RUN_DIR", help="the run directory (path or URL)")
    p.add_argument("--out", metavar="FILE.html", help="where to write the report (default RUN_DIR/report.html)")
    which = p.add_mutually_exclusive_group()
    which.add_argument("--pairs", type=int, default=4, metavar="N",
                       help="number of sample pairs drawn for alignment grids (default 4)")
    which.add_argument("--ids", metavar="ID,ID,...",
                       help="show these pairs instead: values of the corpus id column (--id-column at training), "
                            "else line numbers for text input, else _row")
    p.add_argument("--words", type=int, default=12, metavar="N",
                   help="how many of the most frequent words per side get their top translations (default 12)")
    p.add_argument("--seed", type=int, default=0, help="seed for drawing the sample pairs (default 0)")


def run(args: argparse.Namespace) -> int:
    if args.pairs < 0 or args.words < 0:
        raise ConfigError("--pairs and --words must be at least 0")
    ids = [i.strip() for i in args.ids.split(",") if i.strip()] if args.ids else None
    if args.ids is not None and not ids:
        raise ConfigError("--ids needs at least one id, for example --ids 12,40")
    try:
        import matplotlib  # noqa: F401
    except ImportError:
        raise ConfigError("the report needs matplotlib: pip install 'spark_align[report]' "
                          "(or pip install matplotlib)") from None
    from spark_align.report import write_report

    write_report(args.run, args.out, n_pairs=args.pairs, ids=ids, n_words=args.words, seed=args.seed,
                 log=common.printer)
    return 0
