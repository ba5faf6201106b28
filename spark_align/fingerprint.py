"""Corpus fingerprints: what makes two corpora "the same" for ``--resume``.

Text input: SHA-256 of both files' bytes (streamed through fsspec).
Parquet input: row count, the column names and types, and two order-free sums
of a 64-bit hash of every row's source, target (and id) computed by Spark, so a
fingerprint costs one pass over the corpus and no driver memory.
"""
from __future__ import annotations

import hashlib
import json

import fsspec

from spark_align.config import CorpusConfig


def text_fingerprint(source_path: str, target_path: str) -> str:
    digest = hashlib.sha256()
    for path in (source_path, target_path):
        with fsspec.open(path, "rb") as fh:
            for chunk in iter(lambda: fh.read(1 << 20), b""):
                digest.update(chunk)
        digest.update(b"\0")
    return "text-sha256:" + digest.hexdigest()


def parquet_fingerprint(spark, corpus: CorpusConfig) -> str:
    from pyspark.sql import functions as F

    df = spark.read.parquet(corpus.path)
    cols = [corpus.source_column, corpus.target_column] + ([corpus.id_column] if corpus.id_column else [])
    h = F.xxhash64(*[F.col(c) for c in cols])
    row = df.select(F.count("*").alias("n"),
                    F.sum(h.bitwiseAND(F.lit(0xFFFFFFFF))).alias("lo"),
                    F.sum(F.shiftrightunsigned(h, 32)).alias("hi")).collect()[0]
    schema = [(f.name, f.dataType.simpleString()) for f in df.schema.fields]
    payload = json.dumps({"n": row["n"], "lo": row["lo"], "hi": row["hi"], "schema": schema}, sort_keys=True)
    return "parquet-xxh64:" + hashlib.sha256(payload.encode()).hexdigest()


def corpus_fingerprint(spark, corpus: CorpusConfig) -> str:
    if corpus.is_text:
        return text_fingerprint(corpus.source_text, corpus.target_text)
    return parquet_fingerprint(spark, corpus)
