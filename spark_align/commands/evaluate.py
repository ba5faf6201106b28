"""``spark-align evaluate``: score predicted alignments against gold ones (pyarrow only, no Spark).

Both files may be Parquet (a file or a directory of files) or text (one line per
sentence pair). How rows are matched:

* predicted Parquet (a run's ``output/``) is keyed by ``--id-column`` if given,
  else by ``line`` when present (runs on text input), else by ``_row``;
* a Parquet gold file is keyed by ``--gold-id-column`` (default: the predicted key's name);
* a text file (gold or predicted) is keyed by line number (1-based). When the gold
  is text and the prediction is Parquet without a ``line`` column, line N is the
  N-th row in ``_row`` order, which is the order of the output corpus.

Sentence lengths, for the length buckets and for range checks of both sides'
links, come from the predicted Parquet's source and target text columns when it
has them, or from ``--source-text``/``--target-text``.
"""
from __future__ import annotations

import argparse
import json
import math
import os

import numpy as np

from spark_align import evaluate as ev
from spark_align.errors import ConfigError, InputError

NAME = "evaluate"
HELP = "score predicted alignments against hand-aligned gold links"
DESCRIPTION = ("Print precision, recall, F1 and alignment error rate of predicted alignments against gold "
               "alignments, overall and per source-length bucket. Gold text files hold one line per pair with "
               "'i-j' (sure) and 'i?j' (possible) links, 0-based, source first; gold Parquet files hold a key "
               "column and 'sure' and 'possible' link lists. Rows found on one side only are listed.")

ALIGNMENT_COLUMNS = ("alignment", "alignment_forward", "alignment_reverse")
PARQUET_MAGIC = b"PAR1"


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("--predicted", required=True, metavar="PATH",
                   help="predicted alignments: a run's output (RUN_DIR/output, Parquet) or a text file with "
                        "one line of 'i-j' links per sentence pair")
    p.add_argument("--gold", required=True, metavar="PATH",
                   help="gold alignments: text ('i-j' sure, 'i?j' possible, one line per pair) or Parquet "
                        "(key column + 'sure' and 'possible' lists of {source, target})")
    p.add_argument("--alignment-column", choices=ALIGNMENT_COLUMNS, default="alignment",
                   help="which predicted column to score (default alignment: the combined one)")
    p.add_argument("--id-column", metavar="NAME",
                   help="key column of the predicted Parquet (default: line if present, else _row)")
    p.add_argument("--gold-id-column", metavar="NAME",
                   help="key column of a Parquet gold file (default: the predicted key column's name)")
    p.add_argument("--source-column", default="source",
                   help="source text column of the predicted Parquet, for sentence lengths (default source)")
    p.add_argument("--target-column", default="target",
                   help="target text column of the predicted Parquet, for sentence lengths (default target)")
    p.add_argument("--source-text", metavar="FILE",
                   help="source side of the corpus, one sentence per line, for sentence lengths "
                        "(with --target-text; for text predictions)")
    p.add_argument("--target-text", metavar="FILE", help="target side of the corpus (with --source-text)")
    p.add_argument("--buckets", default="10,20,40",
                   help="upper edges of the source-length buckets, comma-separated (default 10,20,40)")
    p.add_argument("--json", action="store_true", help="print the report as JSON instead of a table")


# ---------------------------------------------------------------------------
# Reading either side
# ---------------------------------------------------------------------------

def is_parquet(path: str) -> bool:
    """A directory, or a file starting with the Parquet magic bytes (``InputError`` if absent)."""
    if os.path.isdir(path):
        return True
    try:
        with open(path, "rb") as fh:
            return fh.read(4) == PARQUET_MAGIC
    except FileNotFoundError:
        raise InputError(f"{path}: no such file or directory") from None
    except OSError as err:
        raise InputError(f"{path}: cannot read: {err.strerror}") from None


def _schema_names(path: str) -> list[str]:
    import pyarrow.parquet as pq

    try:
        return list(pq.ParquetDataset(path).schema.names)
    except Exception as err:  # pyarrow raises several types for data that is not Parquet
        raise InputError(f"{path}: cannot read as Parquet: {err}") from None


def _ordinal_keys(path: str, column: str) -> dict:
    """Map each value of ``column`` to its 1-based rank (the line number of a text file in that order)."""
    import pyarrow.parquet as pq

    values = np.asarray(pq.read_table(path, columns=[column]).column(column).to_numpy(zero_copy_only=False))
    order = np.argsort(values, kind="stable")
    return {values[k].item(): rank for rank, k in enumerate(order, start=1)}


def read_predicted(args, gold_is_text: bool):
    """(links per key, lengths per key or None, key column name or None for a text file)."""
    path = args.predicted
    if not is_parquet(path):
        if args.id_column:
            raise ConfigError("--id-column applies to a Parquet prediction; a text prediction is keyed by line")
        if args.alignment_column != "alignment":
            raise ConfigError("--alignment-column applies to a Parquet prediction (a run's output)")
        lengths = _text_lengths(args)
        return ev.read_links_text(path, lengths=lengths), lengths, None
    names = _schema_names(path)
    if args.alignment_column not in names:
        raise InputError(f"{path}: no column {args.alignment_column!r}; columns are {', '.join(names)}")
    key = args.id_column or ("line" if "line" in names else "_row" if "_row" in names else None)
    if key is None:
        raise ConfigError(f"{path}: has neither 'line' nor '_row'; name its key column with --id-column")
    if key not in names:
        raise InputError(f"{path}: no key column {key!r}; columns are {', '.join(names)}")
    lengths = None
    if args.source_column in names and args.target_column in names:
        lengths = ev.read_lengths_parquet(path, id_column=key, src_column=args.source_column,
                                          tgt_column=args.target_column)
    elif args.source_text or args.target_text:
        raise ConfigError("--source-text/--target-text apply to a text prediction; a Parquet prediction "
                          "gives lengths through --source-column/--target-column")
    links = ev.read_links_parquet(path, id_column=key, column=args.alignment_column, lengths=lengths)
    if gold_is_text and key != "line" and not args.id_column:
        # A text gold file counts lines; line N is the N-th row in _row order (the output's order).
        rank = _ordinal_keys(path, key)
        links = {rank[k]: v for k, v in links.items()}
        lengths = None if lengths is None else {rank[k]: v for k, v in lengths.items()}
    elif gold_is_text and args.id_column not in (None, "line"):
        raise ConfigError("a text gold file is keyed by line number; --id-column needs a Parquet gold file")
    return links, lengths, key


def _text_lengths(args) -> dict | None:
    if not (args.source_text or args.target_text):
        return None
    if not (args.source_text and args.target_text):
        raise ConfigError("--source-text and --target-text go together")
    src, tgt = ev._read_lines(args.source_text), ev._read_lines(args.target_text)
    if len(src) != len(tgt):
        raise InputError(f"line counts differ: {args.source_text} has {len(src)} lines, "
                         f"{args.target_text} has {len(tgt)}")
    return {n: (len(s.split()), len(t.split())) for n, (s, t) in enumerate(zip(src, tgt), start=1)}


def read_gold(args, key: str | None, lengths):
    path = args.gold
    if not is_parquet(path):
        if args.gold_id_column:
            raise ConfigError("--gold-id-column applies to a Parquet gold file; a text gold file is keyed by line")
        return ev.read_gold_text(path, lengths=lengths)
    id_column = args.gold_id_column or key or "line"
    return ev.read_gold_parquet(path, id_column=id_column, lengths=lengths)


def parse_buckets(text: str) -> list[int]:
    try:
        return [int(x) for x in text.split(",") if x.strip()]
    except ValueError:
        raise ConfigError(f"--buckets takes comma-separated integers, got {text!r}") from None


def key_hint(report: dict, predicted: dict, gold: dict) -> str | None:
    """A hint when no row matched although both sides have rows (keys of different kinds)."""
    if report["overall"]["n_sentences"] or not predicted or not gold:
        return None
    p, g = next(iter(predicted)), next(iter(gold))
    return (f"no row key is on both sides (predicted keys look like {p!r}, gold keys like {g!r}); "
            "check --id-column / --gold-id-column")


def _json_safe(obj):
    if isinstance(obj, float) and math.isnan(obj):
        return None
    if isinstance(obj, dict):
        return {k: _json_safe(v) for k, v in obj.items()}
    if isinstance(obj, list):
        return [_json_safe(v) for v in obj]
    if isinstance(obj, np.generic):
        return obj.item()
    return obj


def run(args: argparse.Namespace) -> int:
    edges = parse_buckets(args.buckets)
    gold_is_text = not is_parquet(args.gold)
    predicted, lengths, key = read_predicted(args, gold_is_text)
    gold = read_gold(args, key, lengths)
    report = ev.evaluate(predicted, gold, lengths=lengths, bucket_edges=edges)
    hint = key_hint(report, predicted, gold)
    if args.json:
        print(json.dumps(_json_safe({**report, "column": args.alignment_column, "hint": hint}), sort_keys=True))
    else:
        print(f"predicted: {args.predicted} ({f'column {args.alignment_column}' if key else 'text links'})")
        print(f"gold: {args.gold}")
        if hint:
            print(f"warning: {hint}")
        print(ev.format_report(report))
    return 0
