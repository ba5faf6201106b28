"""Plain-text bitext (one sentence per line, two files) and tokenization, without Spark.

Text files are read on the driver, streaming, through fsspec: the line numbers
in error messages are exact, and invalid UTF-8 is caught at the line where it
occurs (Spark's text reader would silently replace it). A UTF-8 byte order mark
at the start of a file is dropped; Windows line endings (CRLF) are accepted.
"""
from __future__ import annotations

import posixpath
from collections.abc import Iterator

import fsspec
import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from spark_align.errors import InputError

TEXT_SCHEMA = pa.schema([("line", pa.int64()), ("source", pa.string()), ("target", pa.string()),
                         ("_row", pa.int64())])

SKIP_REASONS = {
    "empty_source": "the source side has no tokens",
    "empty_target": "the target side has no tokens",
    "too_long": "a side has more tokens than --max-length",
    "length_ratio": "the longer side is more than --max-ratio times the shorter",
}


def _lines(path: str) -> Iterator[tuple[int, str]]:
    """(1-based line number, text without line ending); InputError on bad UTF-8."""
    try:
        fh = fsspec.open(path, "rb").open()
    except FileNotFoundError:
        raise InputError(f"{path}: no such file") from None
    except OSError as exc:
        raise InputError(f"{path}: cannot read it ({exc.strerror or exc})") from None
    with fh:
        for number, raw in enumerate(fh, start=1):
            try:
                text = raw.decode("utf-8")
            except UnicodeDecodeError as exc:
                raise InputError(f"{path} line {number}: invalid UTF-8 at byte {exc.start} "
                                 f"({raw[exc.start:exc.start + 4]!r})") from None
            if number == 1 and text.startswith("\ufeff"):
                text = text[1:]
            yield number, text.rstrip("\r\n")


def count_and_check(source_path: str, target_path: str) -> int:
    """Validate both files (UTF-8, equal line counts) and return the number of lines."""
    n_src = sum(1 for _ in _lines(source_path))
    n_tgt = sum(1 for _ in _lines(target_path))
    if n_src != n_tgt:
        raise InputError(f"line counts differ: {source_path} has {n_src} lines, {target_path} has {n_tgt}")
    if n_src == 0:
        raise InputError(f"the corpus is empty: {source_path} and {target_path} have no lines")
    return n_src


def write_text_snapshot(source_path: str, target_path: str, out_url: str, *,
                        rows_per_file: int = 1_000_000, chunk: int = 100_000) -> int:
    """Stream the two files into Parquet files under ``out_url`` (after :func:`count_and_check`)."""
    fs, root = fsspec.core.url_to_fs(out_url)
    fs.makedirs(root, exist_ok=True)
    n_rows, part, writer = 0, 0, None
    buf_src: list[str] = []
    buf_tgt: list[str] = []

    def flush() -> None:
        nonlocal n_rows, part, writer
        if not buf_src:
            return
        if writer is None:
            writer = pq.ParquetWriter(fs.open(posixpath.join(root, f"part-{part:05d}.parquet"), "wb"), TEXT_SCHEMA)
        rows = np.arange(n_rows, n_rows + len(buf_src), dtype=np.int64)
        writer.write_table(pa.table({"line": rows + 1, "source": buf_src, "target": buf_tgt, "_row": rows},
                                    schema=TEXT_SCHEMA))
        n_rows += len(buf_src)
        buf_src.clear()
        buf_tgt.clear()
        if n_rows % rows_per_file == 0:
            writer.close()
            writer, part = None, part + 1

    for (_, src), (_, tgt) in zip(_lines(source_path), _lines(target_path)):
        buf_src.append(src)
        buf_tgt.append(tgt)
        if len(buf_src) >= chunk or (n_rows + len(buf_src)) % rows_per_file == 0:
            flush()
    flush()
    if writer is not None:
        writer.close()
    return n_rows


def tokenize(texts: pa.Array, lowercase: bool) -> pa.ListArray:
    """Split on any Unicode whitespace (as ``str.split()`` does); empty text -> no tokens."""
    if lowercase:
        texts = pc.utf8_lower(texts)
    tokens = pc.utf8_split_whitespace(texts)
    # Leading/trailing whitespace gives empty strings: drop them without a Python loop.
    flat = pc.list_flatten(tokens)
    parent = pc.list_parent_indices(tokens).to_numpy()
    keep = pc.not_equal(pc.utf8_length(flat), 0).to_numpy(zero_copy_only=False)
    counts = np.bincount(parent[keep], minlength=len(tokens)).astype(np.int32)
    offsets = np.zeros(len(tokens) + 1, dtype=np.int32)
    np.cumsum(counts, out=offsets[1:])
    return pa.ListArray.from_arrays(pa.array(offsets), flat.filter(pa.array(keep)))


def skip_reasons(n_src: np.ndarray, n_tgt: np.ndarray, max_length: int, max_ratio: float) -> list[str | None]:
    """Reason a pair is left out of training (None = kept), checked in the order of SKIP_REASONS."""
    longer = np.maximum(n_src, n_tgt)
    shorter = np.maximum(np.minimum(n_src, n_tgt), 1)
    codes = np.select(
        [n_src == 0, n_tgt == 0, longer > max_length, longer > max_ratio * shorter],
        [1, 2, 3, 4], default=0)
    names = np.array([None, *SKIP_REASONS], dtype=object)
    return names[codes].tolist()
