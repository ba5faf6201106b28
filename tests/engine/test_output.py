"""The output pass's writers: packed links, the pyarrow writer against Spark's own, file order."""
from __future__ import annotations

import datetime
import decimal
import json
import os

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from spark_align.config import CorpusConfig
from spark_align.engine import output
from spark_align.engine.run import train
from spark_align.errors import ConfigError
from tests.engine.helpers import TOY_SOURCE, TOY_TARGET, config


def _random_links(rng, n_pairs):
    per_pair = rng.integers(0, 6, n_pairs)
    pair = np.repeat(np.arange(n_pairs), per_pair)
    return pair, rng.integers(0, 40, len(pair)), rng.integers(0, 40, len(pair)), rng.random(len(pair))


def test_packed_links_unpack_to_the_nested_column():
    rng = np.random.default_rng(5)
    links = _random_links(rng, 30)
    nested = output.links_column(30, *links)
    packed = output.packed_links(30, *links)
    assert packed.type == pa.binary() and len(packed) == 30
    assert output.unpacked_links(packed).equals(nested)
    # as Spark hands them over: sliced, with nulls (rows the join found no decoding for), large offsets
    with_nulls = pa.array([None if i % 7 == 3 else v for i, v in enumerate(packed.to_pylist())], pa.binary())
    want = [None if i % 7 == 3 else v for i, v in enumerate(nested.to_pylist())]
    assert output.unpacked_links(with_nulls).to_pylist() == want
    assert output.unpacked_links(with_nulls.slice(5, 20)).to_pylist() == want[5:25]
    assert output.unpacked_links(with_nulls.cast(pa.large_binary())).to_pylist() == want
    assert output.unpacked_links(pa.array([], pa.binary())).to_pylist() == []
    with pytest.raises(ValueError, match="whole link records"):
        output.unpacked_links(pa.array([b"\x00" * 17], pa.binary()))


def test_file_shift_keeps_groups_near_the_byte_target_and_under_the_row_cap():
    # 113 bytes per row on disk (the 1M-pair benchmark corpus): 1,194 estimated, 32,768 rows per file
    assert output.file_shift(1_000_000, 113_000_000) == 15
    assert 1 << output.file_shift(1_000, 10 << 30) == 1  # 10 MB rows on disk: one row per file
    assert 1 << output.file_shift(10 ** 9, 10 ** 9) == output.MAX_FILE_ROWS  # tiny rows: the cap
    for n_rows, size in ((10 ** 6, 10 ** 8), (5 * 10 ** 6, 3 * 10 ** 9), (123, 456_789)):
        rows = 1 << output.file_shift(n_rows, size)
        per_row = output.ROW_BYTES_PER_SNAPSHOT_BYTE * size / n_rows + 64
        assert rows * per_row <= output.FILE_BYTES < 2 * rows * per_row or rows in (1, output.MAX_FILE_ROWS)


@pytest.mark.spark
def test_arrow_writer_writes_what_spark_writes_in_row_order(spark, tmp_path, monkeypatch):
    """The pyarrow writer (the default) and Spark's writer give the same schema and rows, on a corpus with
    columns of many types and a skipped row; the Arrow writer's files, read in name order, hold the rows in
    ``_row`` order."""
    n = 40
    source, target = (TOY_SOURCE * 8)[:n], (TOY_TARGET * 8)[:n]
    source[7] = "   "  # skipped: no tokens
    table = pa.table({
        "source": source, "target": target,
        "n": pa.array(range(n), pa.int16()),
        "price": pa.array([decimal.Decimal(i) / 4 for i in range(n)], pa.decimal128(9, 2)),
        "day": pa.array([datetime.date(2026, 1, 1 + i % 28) for i in range(n)], pa.date32()),
        "at": pa.array([datetime.datetime(2026, 1, 1, i % 24, tzinfo=datetime.timezone.utc) for i in range(n)],
                       pa.timestamp("us", tz="UTC")),
        "ok": [i % 3 == 0 for i in range(n)],
        "raw": [bytes([i]) * (i % 4) for i in range(n)],
        "tags": [[f"t{i}"] * (i % 3) if i % 5 else None for i in range(n)],
        "meta": [{"k": i, "v": str(i)} for i in range(n)],
        "attrs": pa.array([[("a", i)] for i in range(n)], pa.map_(pa.string(), pa.int64())),
    })
    pq.write_table(table, tmp_path / "c.parquet")
    monkeypatch.setattr(output, "MAX_FILE_ROWS", 8)  # several files, so the order across them shows
    runs = {}
    before = spark.conf.get(output.OUTPUT_WRITER_CONF, None)
    try:
        for writer in ("spark", "arrow"):
            spark.conf.set(output.OUTPUT_WRITER_CONF, writer)
            runs[writer] = str(tmp_path / writer)
            train(spark, config(CorpusConfig(path=str(tmp_path / "c.parquet")), "ibm1:2"), runs[writer],
                  log=lambda _: None)
        spark.conf.set(output.OUTPUT_WRITER_CONF, "neither")
        with pytest.raises(ConfigError, match="outputWriter must be one of arrow, spark"):
            output.output_writer(spark, spark.range(1).schema)
    finally:
        spark.conf.unset(output.OUTPUT_WRITER_CONF) if before is None else spark.conf.set(output.OUTPUT_WRITER_CONF,
                                                                                         before)
    frames = {w: spark.read.parquet(os.path.join(run, "output")) for w, run in runs.items()}
    assert frames["arrow"].schema == frames["spark"].schema
    assert frames["arrow"].columns[:2] == ["_row", "source"] and frames["arrow"].columns[-1] == "skip_reason"
    rows = {w: sorted(f.collect(), key=lambda r: r["_row"]) for w, f in frames.items()}
    assert len(rows["arrow"]) == n and rows["arrow"] == rows["spark"]
    assert [r["n"] for r in rows["arrow"]] == list(range(n))
    assert [r["n"] for r in rows["arrow"] if r["skip_reason"] is not None] == [7]
    assert rows["arrow"][7]["alignment"] is None and rows["arrow"][8]["alignment"]
    for w, run in runs.items():
        assert json.load(open(os.path.join(run, "output.json")))["writer"] == w
    files = sorted(f for f in os.listdir(os.path.join(runs["arrow"], "output")) if not f.startswith((".", "_")))
    assert len(files) >= n // 8, files
    in_order = pa.concat_tables([pq.read_table(os.path.join(runs["arrow"], "output", f)) for f in files])
    assert in_order.column("_row").to_pylist() == sorted(in_order.column("_row").to_pylist())
    assert not os.path.exists(os.path.join(runs["arrow"], "output", "_temporary"))
    # the engine's unique-valued columns are written without a dictionary, the corpus's and the link
    # positions with one (output.dictionary_columns)
    meta = pq.read_metadata(os.path.join(runs["arrow"], "output", files[0])).row_group(0)
    chunks = {meta.column(i).path_in_schema: meta.column(i) for i in range(meta.num_columns)}
    dictionary = {path for path, c in chunks.items() if c.dictionary_page_offset is not None}
    assert {"source", "tags.list.element", "alignment.list.element.source"} <= dictionary
    assert not dictionary & {"_row", "score_forward", "alignment.list.element.posterior",
                             "alignment_reverse.list.element.posterior"}
