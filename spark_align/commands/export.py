"""``spark-align export links|lexicon|lexical-weights``."""
from __future__ import annotations

import argparse

from spark_align.commands import common

NAME = "export"
HELP = "write links text, lexical translation tables or lexical weighting tables from a run"
DESCRIPTION = ("Export what the next tool in a pipeline reads: 'links' (one line of i-j links per input pair), "
               "'lexicon' (the learnt translation tables with words) or 'lexical-weights' (relative frequencies "
               "of aligned word pairs, for phrase-table scoring). Each runs as a Spark job over RUN_DIR.")


def _positive_or_zero_int(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a whole number, got {text!r}") from None
    if value < 0:
        raise argparse.ArgumentTypeError(f"expected 0 or more, got {value}")
    return value


def _probability(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a number between 0 and 1, got {text!r}") from None
    if not 0.0 <= value <= 1.0:
        raise argparse.ArgumentTypeError(f"expected a number between 0 and 1, got {text}")
    return value


def _common(p: argparse.ArgumentParser, out_help: str) -> None:
    p.add_argument("--run", required=True, metavar="RUN_DIR", help="the run directory to export from")
    p.add_argument("--out", required=True, metavar="PATH", help=out_help)
    p.add_argument("--overwrite", action="store_true", help="replace an earlier export of the same kind at --out")


def _tables(p: argparse.ArgumentParser) -> None:
    from spark_align.export import NULL_TOKEN

    p.add_argument("--direction", choices=("forward", "reverse", "both"), default="both",
                   help="forward = the table conditioned on source words, reverse = on target words, "
                        "both (default)")
    p.add_argument("--format", dest="fmt", choices=("parquet", "tsv", "both"), default="both",
                   help="Parquet folders (columns source, target, probability), tab-separated text with a header, "
                        "or both (default)")
    p.add_argument("--null-token", default=NULL_TOKEN,
                   help=f"the word written for NULL (default {NULL_TOKEN})")


def add_arguments(p: argparse.ArgumentParser) -> None:
    from spark_align.export import DEFAULT_MIN_PROB, DEFAULT_TOP_K

    sub = p.add_subparsers(dest="what", metavar="WHAT", required=True)
    links = sub.add_parser("links", help="one line of space-separated i-j links per input pair, in input order",
                           description="Write one line per input sentence pair, in input order, with the links as "
                                       "space-separated i-j (0-based source index, target index). Filtered pairs "
                                       "and pairs without links give an empty line.")
    _common(links, "the text file to write (path or URL); it appears whole, under its name, only when complete")
    links.add_argument("--alignment", choices=("symmetrized", "forward", "reverse"), default="symmetrized",
                       help="which alignment: the combined one (default; the single direction's for one-direction "
                            "runs), or one direction's own links")
    common.add_spark_options(links)

    lexicon = sub.add_parser("lexicon", help="translation tables t(target|source), t(source|target) with words",
                             description="Write the translation tables of a checkpoint with words instead of ids, "
                                         "pruned by probability and/or per-word rank.")
    _common(lexicon, "folder to write (target_given_source/, source_given_target/, .tsv files, export.json)")
    _tables(lexicon)
    lexicon.add_argument("--min-prob", type=_probability, default=DEFAULT_MIN_PROB,
                         help=f"keep entries with probability >= this (default {DEFAULT_MIN_PROB}; 0 keeps all)")
    lexicon.add_argument("--top-k", type=_positive_or_zero_int, default=DEFAULT_TOP_K,
                         help="then keep at most this many entries per conditioning word, most probable first "
                              "(default 0 = no limit)")
    lexicon.add_argument("--checkpoint", metavar="MODEL:ITERATION",
                         help="which committed checkpoint (default: the one the output corpus was decoded with, "
                              "else the newest, so a run still training can be exported)")
    common.add_spark_options(lexicon)

    weights = sub.add_parser("lexical-weights", help="lexical weighting tables w(target|source), w(source|target)",
                             description="Write lexical weighting tables: relative frequencies of aligned word "
                                         "pairs in the combined alignment of the output corpus, with unaligned "
                                         "words counted against NULL.")
    _common(weights, "folder to write (target_given_source/, source_given_target/, .tsv files, export.json)")
    _tables(weights)
    common.add_spark_options(weights)


def run(args: argparse.Namespace) -> int:
    from spark_align import export
    from spark_align.engine.align import parse_checkpoint

    if args.what == "links":
        export.export_links(common.session(args), args.run, args.out, alignment=args.alignment,
                            overwrite=args.overwrite, log=common.printer)
    elif args.what == "lexicon":
        if args.checkpoint is not None:
            parse_checkpoint(args.checkpoint)  # fail before starting Spark
        export._check_options(args.direction, args.fmt, args.null_token)
        export.export_lexicon(common.session(args), args.run, args.out, direction=args.direction,
                              min_prob=args.min_prob, top_k=args.top_k, fmt=args.fmt, checkpoint=args.checkpoint,
                              null_token=args.null_token, overwrite=args.overwrite, log=common.printer)
    else:
        export._check_options(args.direction, args.fmt, args.null_token)
        export.export_lexical_weights(common.session(args), args.run, args.out, direction=args.direction,
                                      fmt=args.fmt, null_token=args.null_token, overwrite=args.overwrite,
                                      log=common.printer)
    return 0
