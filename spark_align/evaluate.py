"""Score predicted word alignments against a gold standard (pure Python + pyarrow; no Spark).

Metrics (Och & Ney 2003)
------------------------
For predicted links A, sure links S and possible links P (P is taken as P ∪ S):

* precision = |A ∩ P| / |A|
* recall    = |A ∩ S| / |S|
* AER       = 1 - (|A ∩ S| + |A ∩ P|) / (|A| + |S|)
* F1        = 2 · precision · recall / (precision + recall)

Corpus figures are micro-averaged: the four counts are summed over sentences
first, then divided. An empty denominator (no predicted links for precision, no
sure links for recall, neither for AER) gives NaN, meaning "undefined", never
an exception; F1 is NaN if either input is NaN and 0.0 if both are 0.
:func:`format_report` prints NaN as ``n/a``.

Figures are also given per bucket of source sentence length: ``<=10``,
``11-20``, ``21-40``, ``41+`` by default (upper edges 10, 20, 40; choose others
with ``bucket_edges``). Rows whose lengths are not known go to a bucket named
``unknown length``.

Rows are matched by key: a line number for text files, an id column for Parquet.
Only rows on both sides are scored; gold rows with no prediction and predicted
rows with no gold are counted and the first few keys listed in the report.

Gold files
----------
Text: one line per sentence pair, in corpus order; line N (1-based) is the pair
on line N of the corpus and its key is N. A line holds space-separated links:
``i-j`` for a sure link and ``i?j`` for a possible one, source position first,
both 0-based. A blank line is a pair with no links. Each link is listed once: a
link given twice, or both as sure and as possible, is an error (sure already
implies possible).

Parquet (a file or a directory of files): a key column (named by
``id_column``), plus ``sure`` and ``possible`` columns, each
``list<struct<source: int, target: int>>``. ``possible`` holds the links that are
possible but not sure; the same rule applies: a link in both columns, or twice
in one, is an error. A null list is an error (use an empty list for no links).

Predicted files
---------------
Text: one line per pair, ``i-j i-j ...`` (sure-style links only); key = line number.
Parquet: the tool's output, an ``alignment`` column of
``list<struct<source: int, target: int, ...>>`` (extra struct fields such as a
posterior are ignored) plus a key column. A null alignment (a row the aligner
skipped) is left out, so the report lists it among the gold rows without a
prediction.

All parsing problems raise :class:`~spark_align.errors.InputError` naming the
file, the line or row key, and the cause: malformed token, negative position,
duplicated link, a link both sure and possible, a link outside the sentence pair
(checked when sentence lengths are given), null or duplicated keys, or a line
count that differs from the number of pairs whose lengths were given.
"""
from __future__ import annotations

import math
import re
from collections.abc import Hashable, Iterable, Mapping, Sequence
from dataclasses import dataclass

import numpy as np

from spark_align.errors import InputError

Link = tuple[int, int]
Lengths = Mapping[Hashable, tuple[int, int]]

DEFAULT_BUCKET_EDGES = (10, 20, 40)
UNKNOWN_BUCKET = "unknown length"
_TOKEN = re.compile(r"(-?\d+)([-?])(-?\d+)")


@dataclass(frozen=True)
class GoldAlignment:
    """Gold links of one sentence pair.

    ``sure`` is S; ``possible`` is P ∪ S (every sure link is also possible,
    whatever was passed in).
    """

    sure: frozenset[Link]
    possible: frozenset[Link]

    def __post_init__(self):
        object.__setattr__(self, "sure", frozenset(self.sure))
        object.__setattr__(self, "possible", frozenset(self.possible) | self.sure)


# ---------------------------------------------------------------------------
# Metrics
# ---------------------------------------------------------------------------

_COUNT_FIELDS = ("n_sentences", "n_predicted", "n_sure", "n_possible", "n_predicted_sure", "n_predicted_possible")


def sentence_counts(predicted: Iterable[Link], gold: GoldAlignment) -> dict[str, int]:
    """|A|, |S|, |P ∪ S|, |A ∩ S|, |A ∩ P| for one sentence pair (as a dict of counts)."""
    pred = predicted if isinstance(predicted, (set, frozenset)) else set(predicted)
    return {"n_sentences": 1, "n_predicted": len(pred), "n_sure": len(gold.sure),
            "n_possible": len(gold.possible), "n_predicted_sure": len(pred & gold.sure),
            "n_predicted_possible": len(pred & gold.possible)}


def _ratio(num: int, den: int) -> float:
    return num / den if den else math.nan


def metrics_from_counts(counts: Mapping[str, int]) -> dict[str, float]:
    """Precision, recall, F1 and AER from summed counts (NaN where undefined; see module docstring)."""
    precision = _ratio(counts["n_predicted_possible"], counts["n_predicted"])
    recall = _ratio(counts["n_predicted_sure"], counts["n_sure"])
    aer = 1.0 - _ratio(counts["n_predicted_sure"] + counts["n_predicted_possible"],
                       counts["n_predicted"] + counts["n_sure"])
    if math.isnan(precision) or math.isnan(recall):
        f1 = math.nan
    elif precision + recall == 0.0:
        f1 = 0.0
    else:
        f1 = 2.0 * precision * recall / (precision + recall)
    return {"precision": precision, "recall": recall, "f1": f1, "aer": aer}


def _bucket_names(edges: Sequence[int]) -> list[str]:
    names, low = [], None
    for edge in edges:
        names.append(f"<={edge}" if low is None else f"{low}-{edge}")
        low = edge + 1
    names.append(f"{low}+" if edges else "all lengths")
    return names


def _bucket_of(n_src: int, edges: Sequence[int], names: list[str]) -> str:
    for edge, name in zip(edges, names):
        if n_src <= edge:
            return name
    return names[-1]


def evaluate(predicted: Mapping[Hashable, Iterable[Link]], gold: Mapping[Hashable, GoldAlignment], *,
             lengths: Lengths | None = None, bucket_edges: Sequence[int] = DEFAULT_BUCKET_EDGES,
             n_listed: int = 5) -> dict:
    """Score predicted alignments against gold ones, overall and per source-length bucket.

    Parameters
    ----------
    predicted : mapping key -> iterable of (int, int)
        Predicted links per row key (line number or id).
    gold : mapping key -> GoldAlignment
        Gold links per row key.
    lengths : mapping key -> (n_src, n_tgt), optional
        Sentence lengths; used for the length buckets and to check that every
        predicted link lies inside its sentence pair (a link outside means the
        two sides were joined wrongly).
    bucket_edges : increasing ints
        Upper edges of the source-length buckets.
    n_listed : int
        How many unmatched keys to list in the report.

    Returns
    -------
    dict
        ``overall``: counts (``n_sentences``, ``n_predicted``, ``n_sure``,
        ``n_possible``, ``n_predicted_sure``, ``n_predicted_possible``) and
        ``precision``, ``recall``, ``f1``, ``aer``; ``buckets``: a list of the
        same with a ``bucket`` name, in bucket order, empty buckets left out;
        ``missing`` (gold rows with no prediction) and ``extra`` (predicted rows
        with no gold), each ``{"count": int, "first": [keys]}``.
    """
    edges = list(bucket_edges)
    if any(b <= a for a, b in zip(edges, edges[1:])) or any(e < 0 for e in edges):
        raise InputError(f"bucket edges must be increasing non-negative integers, got {edges}")
    names = _bucket_names(edges)
    overall = dict.fromkeys(_COUNT_FIELDS, 0)
    per_bucket = {name: dict.fromkeys(_COUNT_FIELDS, 0) for name in names + [UNKNOWN_BUCKET]}
    missing, extra = [], []
    for key, gold_row in gold.items():
        if key not in predicted:
            missing.append(key)
            continue
        pred = set(predicted[key])
        size = lengths.get(key) if lengths is not None else None
        if size is not None:
            n_src, n_tgt = size
            outside = sorted(link for link in pred if not (0 <= link[0] < n_src and 0 <= link[1] < n_tgt))
            if outside:
                i, j = outside[0]
                raise InputError(f"row {key!r}: predicted link {i}-{j} is outside the sentence pair "
                                 f"({n_src} source x {n_tgt} target tokens); are the files joined on the right key?")
            bucket = _bucket_of(n_src, edges, names)
        else:
            bucket = UNKNOWN_BUCKET
        counts = sentence_counts(pred, gold_row)
        for field in _COUNT_FIELDS:
            overall[field] += counts[field]
            per_bucket[bucket][field] += counts[field]
    extra = [key for key in predicted if key not in gold]
    return {
        "overall": {**overall, **metrics_from_counts(overall)},
        "buckets": [{"bucket": name, **c, **metrics_from_counts(c)}
                    for name, c in per_bucket.items() if c["n_sentences"]],
        "missing": {"count": len(missing), "first": missing[:n_listed]},
        "extra": {"count": len(extra), "first": extra[:n_listed]},
    }


def _fmt(value: float) -> str:
    return "n/a" if math.isnan(value) else f"{value:.4f}"


def format_report(report: Mapping) -> str:
    """A small plain-text table of :func:`evaluate`'s report, for the CLI to print."""
    overall = report["overall"]
    lines = [f"rows scored: {overall['n_sentences']} (predicted links {overall['n_predicted']}, "
             f"sure {overall['n_sure']}, possible incl. sure {overall['n_possible']})"]
    for field, what in (("missing", "gold rows without a prediction"), ("extra", "predicted rows not in the gold file")):
        part = report[field]
        if part["count"]:
            more = ", ..." if part["count"] > len(part["first"]) else ""
            lines.append(f"{what}: {part['count']} (not scored; first: "
                         f"{', '.join(str(k) for k in part['first'])}{more})")
    lines.append("")
    header = f"{'source length':<15} {'sentences':>9} {'precision':>9} {'recall':>9} {'F1':>9} {'AER':>9}"
    lines += [header, "-" * len(header)]
    rows = [("all", overall)] + [(b["bucket"], b) for b in report["buckets"]]
    for name, r in rows:
        lines.append(f"{name:<15} {r['n_sentences']:>9} {_fmt(r['precision']):>9} {_fmt(r['recall']):>9} "
                     f"{_fmt(r['f1']):>9} {_fmt(r['aer']):>9}")
    return "\n".join(lines)


# ---------------------------------------------------------------------------
# Text files
# ---------------------------------------------------------------------------

def _read_lines(path) -> list[str]:
    try:
        with open(path, "rb") as handle:
            data = handle.read()
    except FileNotFoundError:
        raise InputError(f"{path}: no such file") from None
    except OSError as err:
        raise InputError(f"{path}: cannot read: {err.strerror}") from None
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as err:
        line = data[:err.start].count(b"\n") + 1
        raise InputError(f"{path}: line {line}: not valid UTF-8") from None
    # Split on "\n" only: other Unicode line breaks must not shift the line numbers.
    lines = text.split("\n")
    if lines and lines[-1] == "":
        lines.pop()  # the newline that ends the last line does not start another pair
    return [line.rstrip("\r") for line in lines]


def _lengths_by_line(lengths, n_lines: int, path) -> Lengths | None:
    if lengths is None or isinstance(lengths, Mapping):
        return lengths
    if len(lengths) != n_lines:
        raise InputError(f"{path}: has {n_lines} lines but sentence lengths were given for {len(lengths)} pairs; "
                         "the file must have one line per sentence pair")
    return {k + 1: tuple(v) for k, v in enumerate(lengths)}


def _parse_line(text: str, where: str, size, *, allow_possible: bool) -> tuple[list[Link], list[Link]]:
    """(sure, possible) links of one line, checked; ``where`` names the file and line."""
    sure: list[Link] = []
    possible: list[Link] = []
    seen: dict[Link, str] = {}
    for token in text.split():
        match = _TOKEN.fullmatch(token)
        if match is None:
            shape = "'i-j' or 'i?j'" if allow_possible else "'i-j'"
            raise InputError(f"{where}: malformed link {token!r}; expected {shape} with 0-based integer positions")
        i, mark, j = int(match[1]), match[2], int(match[3])
        if i < 0 or j < 0:
            raise InputError(f"{where}: link {token!r} has a negative position")
        if mark == "?" and not allow_possible:
            raise InputError(f"{where}: possible link {token!r} in a predicted alignment; only 'i-j' links are allowed")
        if size is not None and not (i < size[0] and j < size[1]):
            raise InputError(f"{where}: link {token!r} is outside the sentence pair "
                             f"({size[0]} source x {size[1]} target tokens)")
        if (i, j) in seen:
            if seen[(i, j)] != mark:
                raise InputError(f"{where}: link {i}-{j} is marked both sure and possible; "
                                 "list it once (a sure link is also possible)")
            raise InputError(f"{where}: link {token!r} is listed twice")
        seen[(i, j)] = mark
        (sure if mark == "-" else possible).append((i, j))
    return sure, possible


def read_gold_text(path, *, lengths: Lengths | Sequence[tuple[int, int]] | None = None) -> dict[int, GoldAlignment]:
    """Read a gold text file (format in the module docstring).

    Parameters
    ----------
    path : str or path
    lengths : sequence of (n_src, n_tgt), one per line, or mapping line number -> (n_src, n_tgt), optional
        When given, links are checked against the sentence lengths; a sequence
        must have exactly one entry per line.

    Returns
    -------
    dict
        1-based line number -> :class:`GoldAlignment`.
    """
    lines = _read_lines(path)
    sizes = _lengths_by_line(lengths, len(lines), path)
    out = {}
    for number, text in enumerate(lines, start=1):
        size = sizes.get(number) if sizes is not None else None
        sure, possible = _parse_line(text, f"{path}: line {number}", size, allow_possible=True)
        out[number] = GoldAlignment(frozenset(sure), frozenset(possible))
    return out


def read_links_text(path, *, lengths: Lengths | Sequence[tuple[int, int]] | None = None) -> dict[int, frozenset[Link]]:
    """Read predicted links, one line per pair ``i-j i-j ...``; returns 1-based line number -> links."""
    lines = _read_lines(path)
    sizes = _lengths_by_line(lengths, len(lines), path)
    out = {}
    for number, text in enumerate(lines, start=1):
        size = sizes.get(number) if sizes is not None else None
        sure, _ = _parse_line(text, f"{path}: line {number}", size, allow_possible=False)
        out[number] = frozenset(sure)
    return out


# ---------------------------------------------------------------------------
# Parquet files
# ---------------------------------------------------------------------------

def _read_table(path, columns: list[str]):
    import pyarrow.parquet as pq

    try:
        schema = pq.ParquetDataset(path).schema
    except FileNotFoundError:
        raise InputError(f"{path}: no such file or directory") from None
    except Exception as err:  # pyarrow raises several types for a file that is not Parquet
        raise InputError(f"{path}: cannot read as Parquet: {err}") from None
    absent = [c for c in columns if c not in schema.names]
    if absent:
        raise InputError(f"{path}: no column {absent[0]!r}; columns are {', '.join(schema.names)}")
    try:
        return pq.read_table(path, columns=columns)
    except Exception as err:
        raise InputError(f"{path}: cannot read as Parquet: {err}") from None


def _keys(table, id_column: str, path) -> list:
    keys = table.column(id_column).to_pylist()
    seen = set()
    for row, key in enumerate(keys):
        if key is None:
            raise InputError(f"{path}: row {row}: {id_column!r} is null; every row needs a key")
        if key in seen:
            raise InputError(f"{path}: key {key!r} appears in more than one row")
        seen.add(key)
    return keys


def _link_lists(table, column: str, keys: list, path, *, allow_null: bool, sizes: Lengths | None) -> list:
    """Per row: a list of (i, j) links, or None for a null list (only if ``allow_null``)."""
    import pyarrow as pa

    arr = table.column(column).combine_chunks() if table.num_rows else None
    if arr is None:
        return []
    kind = arr.type
    value_type = getattr(kind, "value_type", None)
    if not (pa.types.is_list(kind) or pa.types.is_large_list(kind)) or not pa.types.is_struct(value_type) or \
            value_type.get_field_index("source") < 0 or value_type.get_field_index("target") < 0:
        raise InputError(f"{path}: column {column!r} has type {kind}; expected list<struct<source: int, target: int>>")
    for field in ("source", "target"):
        if not pa.types.is_integer(value_type.field(field).type):
            raise InputError(f"{path}: column {column!r}: field {field!r} has type "
                             f"{value_type.field(field).type}; expected an integer")
    row_null = arr.is_null().to_numpy(zero_copy_only=False)
    offsets = np.asarray(arr.offsets, dtype=np.int64)
    values = arr.values
    src_arr, tgt_arr = values.field("source"), values.field("target")
    bad_value = values.is_null().to_numpy(zero_copy_only=False) | src_arr.is_null().to_numpy(zero_copy_only=False) | \
        tgt_arr.is_null().to_numpy(zero_copy_only=False)
    src = src_arr.fill_null(0).to_numpy(zero_copy_only=False).astype(np.int64)
    tgt = tgt_arr.fill_null(0).to_numpy(zero_copy_only=False).astype(np.int64)
    bad_value |= (src < 0) | (tgt < 0)
    out = []
    for row, key in enumerate(keys):
        where = f"{path}: row {key!r}: column {column!r}"
        if row_null[row]:
            if not allow_null:
                raise InputError(f"{where} is null; use an empty list for no links")
            out.append(None)
            continue
        a, b = offsets[row], offsets[row + 1]
        if bad_value[a:b].any():
            k = a + int(np.argmax(bad_value[a:b]))
            raise InputError(f"{where}: link {k - a} has a null or negative position")
        links = list(zip(src[a:b].tolist(), tgt[a:b].tolist()))
        if len(set(links)) != len(links):
            seen = set()
            dup = next(link for link in links if link in seen or seen.add(link))
            raise InputError(f"{where}: link {dup[0]}-{dup[1]} is listed twice")
        size = sizes.get(key) if sizes is not None else None
        if size is not None:
            outside = [link for link in links if not (link[0] < size[0] and link[1] < size[1])]
            if outside:
                raise InputError(f"{where}: link {outside[0][0]}-{outside[0][1]} is outside the sentence pair "
                                 f"({size[0]} source x {size[1]} target tokens)")
        out.append(links)
    return out


def read_gold_parquet(path, *, id_column: str, lengths: Lengths | None = None) -> dict[Hashable, GoldAlignment]:
    """Read gold links from Parquet (``sure`` and ``possible`` columns; see the module docstring).

    Returns key -> :class:`GoldAlignment`; ``lengths`` (key -> (n_src, n_tgt)) enables range checks.
    """
    table = _read_table(path, [id_column, "sure", "possible"])
    keys = _keys(table, id_column, path)
    sure = _link_lists(table, "sure", keys, path, allow_null=False, sizes=lengths)
    possible = _link_lists(table, "possible", keys, path, allow_null=False, sizes=lengths)
    out = {}
    for key, s, p in zip(keys, sure, possible):
        both = set(s) & set(p)
        if both:
            i, j = min(both)
            raise InputError(f"{path}: row {key!r}: link {i}-{j} is in both 'sure' and 'possible'; "
                             "list it once (a sure link is also possible)")
        out[key] = GoldAlignment(frozenset(s), frozenset(p))
    return out


def read_links_parquet(path, *, id_column: str, column: str = "alignment",
                       lengths: Lengths | None = None) -> dict[Hashable, frozenset[Link]]:
    """Read predicted links from Parquet (the tool's output); returns key -> links.

    Rows whose ``column`` is null (skipped by the aligner) are left out.
    """
    table = _read_table(path, [id_column, column])
    keys = _keys(table, id_column, path)
    links = _link_lists(table, column, keys, path, allow_null=True, sizes=lengths)
    return {key: frozenset(row) for key, row in zip(keys, links) if row is not None}


def read_lengths_parquet(path, *, id_column: str, src_column: str = "source",
                         tgt_column: str = "target") -> dict[Hashable, tuple[int, int]]:
    """Sentence lengths (whitespace tokens, as the corpus reader counts them) per key from text columns.

    Rows with a null source or target text are left out.
    """
    import pyarrow as pa

    table = _read_table(path, [id_column, src_column, tgt_column])
    keys = _keys(table, id_column, path)
    for name in (src_column, tgt_column):
        if not (pa.types.is_string(table.schema.field(name).type) or pa.types.is_large_string(table.schema.field(name).type)):
            raise InputError(f"{path}: column {name!r} has type {table.schema.field(name).type}; expected text")
    src = table.column(src_column).to_pylist()
    tgt = table.column(tgt_column).to_pylist()
    return {key: (len(s.split()), len(t.split())) for key, s, t in zip(keys, src, tgt)
            if s is not None and t is not None}
