"""The ``spark-align`` command. Errors in user input are one line and exit code 2, never a traceback."""
from __future__ import annotations

import argparse
import importlib
import os
import sys
from collections.abc import Sequence

from spark_align import __version__
from spark_align.commands import COMMAND_MODULES
from spark_align.errors import SparkAlignError

EXIT_USAGE = 2


def _modules():
    for name in COMMAND_MODULES:
        try:
            yield importlib.import_module(f"spark_align.commands.{name}")
        except ModuleNotFoundError as exc:
            if exc.name != f"spark_align.commands.{name}":
                raise


def build_parser() -> tuple[argparse.ArgumentParser, dict]:
    parser = argparse.ArgumentParser(
        prog="spark-align",
        description="Train word-alignment models (IBM Model 1, Model 2, HMM) by EM on Spark and write "
                    "word alignments beside a parallel corpus.")
    parser.add_argument("--version", action="version", version=f"spark_align {__version__}")
    parser.add_argument("--debug", action="store_true", help="show full tracebacks of unexpected errors")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    commands = {}
    for module in _modules():
        p = sub.add_parser(module.NAME, help=module.HELP, description=module.DESCRIPTION)
        module.add_arguments(p)
        commands[module.NAME] = module.run
    return parser, commands


def main(argv: Sequence[str] | None = None) -> int:
    parser, commands = build_parser()
    args = parser.parse_args(argv)
    if args.command is None:
        parser.print_help()
        return EXIT_USAGE
    try:
        return commands[args.command](args)
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
