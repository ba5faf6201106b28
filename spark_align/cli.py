"""The ``spark-align`` command. Errors in user input are one line and exit code 2."""
from __future__ import annotations

import argparse
import os
import sys
from collections.abc import Sequence

from spark_align import __version__
from spark_align.config import (DECODINGS, DIRECTIONS, INITS, SYMMETRIZATIONS, CorpusConfig, RunConfig,
                                parse_stages)
from spark_align.errors import ConfigError, SparkAlignError

EXIT_USAGE = 2
DEMO_STAGES = "ibm1:5"


def _conf_pairs(items: Sequence[str]) -> dict[str, str]:
    out = {}
    for item in items:
        key, sep, value = item.partition("=")
        if not sep or not key:
            raise ConfigError(f"--conf takes KEY=VALUE, got {item!r}")
        out[key.strip()] = value.strip()
    return out


def add_spark_options(p: argparse.ArgumentParser) -> None:
    g = p.add_argument_group("Spark")
    g.add_argument("--master", default="local[*]",
                   help="Spark master URL: local[*] (all cores of this machine, the default), local[N], "
                        "local-cluster[N,cores,MB], spark://host:7077, yarn, k8s://...")
    g.add_argument("--conf", action="append", default=[], metavar="KEY=VALUE",
                   help="extra Spark setting, repeatable (for example --conf spark.executor.memory=8g)")


def add_corpus_options(p: argparse.ArgumentParser) -> None:
    g = p.add_argument_group("corpus")
    g.add_argument("--corpus", metavar="PATH",
                   help="Parquet corpus: a file or a directory of Parquet files, one sentence pair per row")
    g.add_argument("--source-text", metavar="FILE",
                   help="plain-text source side, one sentence per line (use with --target-text)")
    g.add_argument("--target-text", metavar="FILE",
                   help="plain-text target side, same number of lines as --source-text")
    g.add_argument("--source-column", default="source", help="Parquet column holding source sentences "
                   "(default: source)")
    g.add_argument("--target-column", default="target", help="Parquet column holding target sentences "
                   "(default: target)")
    g.add_argument("--id-column", help="Parquet column with a row id, carried through to the output")
    g.add_argument("--lowercase", action="store_true", help="lowercase both sides before training")
    g.add_argument("--max-length", type=int, default=100,
                   help="pairs with a side longer than this many tokens are not trained on (default 100); "
                        "they stay in the output with skip_reason 'too_long'")
    g.add_argument("--max-ratio", type=float, default=9.0,
                   help="pairs whose longer side has more than this many times the tokens of the shorter "
                        "are not trained on (default 9); skip_reason 'length_ratio'")


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="spark-align",
        description="Train word-alignment models (IBM Model 1, Model 2, HMM) by EM on Spark and write "
                    "word alignments beside a parallel corpus.")
    parser.add_argument("--version", action="version", version=f"spark_align {__version__}")
    parser.add_argument("--debug", action="store_true", help="show full tracebacks of unexpected errors")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")

    t = sub.add_parser("train", help="train alignment models on a corpus and write aligned output",
                       description="Train the stages on a parallel corpus. Sentences are pre-tokenized text: "
                                   "tokens are split on whitespace. Everything is written under --run.")
    add_corpus_options(t)
    g = t.add_argument_group("training")
    g.add_argument("--run", required=True, metavar="RUN_DIR",
                   help="run directory (local path or URL) that receives vocabularies, checkpoints and output")
    g.add_argument("--stages", default="ibm1:5",
                   help="models and iterations, in order, as NAME:N,NAME:N (default ibm1:5); each stage starts "
                        "from the previous stage's translation table. Models: "
                        + ", ".join(_model_names()))
    g.add_argument("--directions", choices=DIRECTIONS, default="forward",
                   help="forward = p(target | source), reverse = p(source | target), both = train both and "
                        "combine their alignments (default forward)")
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
    add_spark_options(t)

    d = sub.add_parser("demo", help="generate a small demo corpus, train on it in local mode, show results",
                       description="Generate a deterministic demo corpus of invented sentence pairs, train "
                                   "on it in local mode and print where the outputs are and a few alignments.")
    d.add_argument("--dir", default="spark-align-demo", metavar="DIR",
                   help="folder for the demo corpus (DIR/corpus) and run (DIR/run); default ./spark-align-demo, "
                        "replaced if it holds an earlier demo")
    d.add_argument("--pairs", type=int, default=3000, help="number of generated sentence pairs (default 3000)")
    d.add_argument("--stages", default=DEMO_STAGES, help=f"stages as in train (default {DEMO_STAGES})")
    d.add_argument("--directions", choices=DIRECTIONS, default="both", help="as in train (default both)")
    add_spark_options(d)
    return parser


def _model_names() -> list[str]:
    from spark_align.models import MODELS

    return sorted(MODELS)


def config_from_args(args: argparse.Namespace) -> RunConfig:
    corpus = CorpusConfig(path=args.corpus, source_text=args.source_text, target_text=args.target_text,
                          source_column=args.source_column, target_column=args.target_column,
                          id_column=args.id_column, lowercase=args.lowercase, max_length=args.max_length,
                          max_ratio=args.max_ratio)
    return RunConfig(corpus=corpus, stages=parse_stages(args.stages), directions=args.directions,
                     init=args.init, seed=args.seed, block_size=args.block_size, decoding=args.decoding,
                     posterior_threshold=args.posterior_threshold, symmetrization=args.symmetrization)


def session(args: argparse.Namespace):
    from spark_align.engine.session import get_session

    return get_session(args.master, _conf_pairs(args.conf))


def cmd_train(args: argparse.Namespace) -> int:
    from spark_align.engine.run import train

    cfg = config_from_args(args)
    if args.resume and args.resume_from:
        raise ConfigError("use either --resume or --resume-from, not both")
    spark = session(args)
    train(spark, cfg, args.run, resume=args.resume, resume_from=args.resume_from,
          log=lambda line: print(line, flush=True))
    return 0


def cmd_demo(args: argparse.Namespace) -> int:
    from spark_align.demo import run_demo

    parse_stages(args.stages)
    run_demo(session(args), demo_dir=args.dir, n_pairs=args.pairs, stages=args.stages, directions=args.directions,
             log=lambda line: print(line, flush=True))
    return 0


COMMANDS = {"train": cmd_train, "demo": cmd_demo}


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if args.command is None:
        parser.print_help()
        return EXIT_USAGE
    try:
        return COMMANDS[args.command](args)
    except SparkAlignError as exc:
        print(f"spark-align: error: {exc}", file=sys.stderr)
        return EXIT_USAGE
    except KeyboardInterrupt:
        print("spark-align: interrupted; committed checkpoints are kept (use --resume)", file=sys.stderr)
        return 130
    except Exception as exc:  # noqa: BLE001 - the last line of defence against tracebacks
        if args.debug or os.environ.get("SPARK_ALIGN_DEBUG"):
            raise
        first = (str(exc).strip().splitlines() or [type(exc).__name__])[0]
        print(f"spark-align: unexpected error: {type(exc).__name__}: {first[:500]} "
              f"(run with --debug for the traceback)", file=sys.stderr)
        return 1


if __name__ == "__main__":
    sys.exit(main())
