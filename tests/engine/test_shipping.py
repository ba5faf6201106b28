"""Per-block (join) and whole-table (broadcast) parameter shipping, the size rule, and pruning."""
from __future__ import annotations

import dataclasses
import os
import shutil

import numpy as np
import pyarrow.parquet as pq
import pytest

from spark_align.config import CorpusConfig, RunConfig
from spark_align.corpus import synthetic
from spark_align.engine import em, ingest, mstep, shipping, tables
from spark_align.engine.run import train
from spark_align.errors import ConfigError
from spark_align.kernels import ragged
from spark_align.store import RunStore
from tests.engine.helpers import (TOY_SOURCE, TOY_TARGET, config, manifest, read_output, read_table, routed_records,
                                  write_parquet, write_text)


# -- the size rule (no Spark) --------------------------------------------------------------
def test_auto_rule_switches_at_the_documented_threshold():
    budget_mb = 1.0
    at_budget = 2 ** 20 // shipping.BYTES_PER_ENTRY  # the most entries that fit 1 MB
    assert shipping.choose_shipping("auto", at_budget, budget_mb) == "broadcast"
    assert shipping.choose_shipping("auto", at_budget + 1, budget_mb) == "join"
    assert shipping.choose_shipping("broadcast", 10 ** 12, budget_mb) == "broadcast"
    assert shipping.choose_shipping("join", 1, budget_mb) == "join"
    # The initial uniform table is a constant: nothing per entry to ship, whatever is forced.
    assert shipping.choose_shipping("join", None, budget_mb) == "broadcast"
    with pytest.raises(ValueError):
        shipping.choose_shipping("scatter", 1, budget_mb)


@pytest.mark.parametrize("batch_rows", [7, None], ids=["routes read 7 rows at a time", "routes read whole"])
def test_routed_entries_give_what_the_broadcast_lookup_gives(tmp_path, monkeypatch, batch_rows):
    """A unit's entries, routed to it from the table's buckets (whatever order the buckets' records
    arrive in, and however the routes' writes and the lookups' reads cut a unit's keys), find a block's
    dictionary as the whole table does: the same probabilities, bit for bit, and the floor where the
    table has no entry. Missing, repeated or cut records are refused."""
    if batch_rows is not None:
        monkeypatch.setattr(shipping, "ROUTE_BATCH_ROWS", batch_rows)
    rng = np.random.default_rng(3)
    unit_keys = {u: np.unique(rng.integers(0, 2 ** 40, 300 + 50 * u)) for u in range(3)}
    whole, entries = {}, {}
    for d, direction in enumerate(("forward", "reverse")):
        mixed = np.concatenate([rng.choice(k, 150 + 20 * d, replace=False) for k in unit_keys.values()])
        table_keys = np.unique(np.concatenate([mixed, rng.integers(2 ** 41, 2 ** 42, 50)]))  # + keys of no unit
        table_probs = rng.uniform(0, 1, len(table_keys))
        whole[direction] = tables.DirectionTable(table_keys, table_probs)
        entries[d] = (table_keys, table_probs)
    routed = routed_records(tmp_path, unit_keys, entries, n_buckets=5)
    assert sorted(routed) == [0, 1, 2]
    if batch_rows is not None:  # written 7 rows at a time too
        assert pq.ParquetFile(tmp_path / "routes" / "part-00000.parquet").metadata.num_row_groups > 1
    for unit, keys in unit_keys.items():
        records = routed[unit][::-1] if unit % 2 else routed[unit]
        got = shipping.unit_entries(keys, records, ("forward", "reverse"), 5, unit)
        block_keys = np.sort(rng.choice(keys, 200, replace=False))
        for direction in ("forward", "reverse"):
            want = whole[direction].local(block_keys)
            assert np.array_equal(got[direction].local(block_keys), want)
            assert 0 < np.sum(want == tables.MIN_PROB) < len(block_keys)
    # a bucket no unit key falls in: an empty routes file, no records
    with open(tmp_path / "routes" / "part-00009.parquet", "wb") as fh:
        shipping.write_routes(fh, [])
    assert list(shipping.make_route_lookup(str(tmp_path / "routes"), ("forward", "reverse"))(9, {})) == []
    records = routed[1]
    with pytest.raises(RuntimeError, match="no forward entries arrived from table buckets"):
        shipping.unit_entries(unit_keys[1], records[1:], ("forward",), 5, 1)
    with pytest.raises(RuntimeError, match="arrived twice"):
        shipping.unit_entries(unit_keys[1], [records[0], *records], ("forward",), 5, 1)
    with pytest.raises(RuntimeError, match="entries of table bucket"):
        shipping.unit_entries(unit_keys[1][1:], records, ("forward",), 5, 1)


def test_lookups_keep_where_route_keys_sat_and_take_them_for_a_table_with_the_same_keys(tmp_path):
    """A lookup over a table file with a key digest keeps each routes key's position in it; a later
    lookup over a file with that digest reads only its probabilities and gives the same records, bit
    for bit. Damaged positions, or a table with other keys, are searched again (and kept again)."""
    import fsspec
    import pyarrow as pa

    rng = np.random.default_rng(11)
    unit_keys = {u: np.unique(ragged.make_key(rng.integers(0, 300, 400), rng.integers(0, 300, 400)))
                 for u in range(3)}
    n_buckets = 2
    entries = {}
    for d in (0, 1):
        every = np.unique(np.concatenate(list(unit_keys.values())))
        keys = every[rng.random(len(every)) < 0.8]
        entries[d] = (keys, rng.uniform(0, 1, len(keys)))
    want = routed_records(tmp_path, unit_keys, entries, n_buckets)  # entries given: nothing kept
    root = tmp_path / "routes"
    assert not (root / shipping.ROUTE_POSITIONS).exists()

    def bucket_file(p, probs_scale=1.0):
        rows = [(d, k, pr * probs_scale) for d, (keys, probs) in entries.items()
                for k, pr in zip(keys, probs) if shipping.key_buckets(np.array([k]), d, n_buckets)[0] == p]
        rows.sort()
        return pa.table({"dir": pa.array([r[0] for r in rows], pa.int8()),
                         "src": pa.array([r[1] >> 32 for r in rows], pa.int32()),
                         "tgt": pa.array([r[1] & 0xFFFFFFFF for r in rows], pa.int32()),
                         "prob": pa.array([r[2] for r in rows], pa.float64())})

    lookup = shipping.make_route_lookup(str(root), ("forward", "reverse"))
    read = []

    def run(digest, scale=1.0):
        got = {}
        for p in range(n_buckets):
            part = bucket_file(p, scale)

            def table(columns, part=part):
                read.append(tuple(columns))
                return part.select(columns)
            for unit, record in lookup(p, table=table, digest=digest):
                got.setdefault(unit, []).append(record)
        return got

    digest = b"0123456789abcdef" * 2
    assert run(digest) == want  # searched, positions kept
    kept = sorted((root / shipping.ROUTE_POSITIONS).iterdir())
    assert [f.name for f in kept] == ["part-00000.bin", "part-00001.bin"]
    read.clear()
    assert run(digest) == want  # taken at the kept positions
    assert set(read) == {("dir", "prob")}
    # new probabilities in the same keys: the same positions, the new values
    scaled = run(digest, 0.5)
    halved = routed_records(tmp_path / "again", unit_keys, {d: (k, pr * 0.5) for d, (k, pr) in entries.items()},
                            n_buckets)
    assert scaled == halved
    # damaged positions, or positions for other keys: searched again
    data = bytearray(kept[0].read_bytes())
    data[60] ^= 1
    kept[0].write_bytes(bytes(data))
    read.clear()
    assert run(digest) == want
    assert ("dir", "src", "tgt", "prob") in read
    read.clear()
    assert run(b"f" * 32) == want
    assert set(read) == {("dir", "src", "tgt", "prob")}
    fs = fsspec.filesystem("file")
    for path in kept:
        for digest_, dirs, usable in ((b"f" * 32, [0, 1], True), (digest, [0, 1], False), (b"f" * 32, [0], False)):
            opened = shipping.RoutePositions.open_checked(fs, str(path), digest_, dirs)
            assert (opened is not None) == usable
            if opened is not None:
                opened[0].close()
    kept[1].write_bytes(kept[1].read_bytes()[:-1])  # cut short
    assert shipping.RoutePositions.open_checked(fs, str(kept[1]), b"f" * 32, [0, 1]) is None
    assert sorted(p.name for p in (root / shipping.ROUTE_POSITIONS).iterdir()) == ["part-00000.bin", "part-00001.bin"]


def test_workers_read_the_reducers_files_with_their_buckets(tmp_path):
    """Tables read from the reducers' files one by one equal the table read whole, and every entry's
    reducer bucket (known from its file) is the hash the reducers use; a file without the bucket
    metadata (an older table) makes the reader fall back to the whole read."""
    from spark_align.engine import estep, mstep
    from spark_align.kernels import counts

    rng = np.random.default_rng(4)
    n = 4000
    dirs = rng.integers(0, 2, n).astype(np.int8)
    src, tgt = rng.integers(0, 200, n).astype(np.int32), rng.integers(0, 150, n).astype(np.int32)
    buffer = counts.CountBuffer()
    mstep.fold_rows(buffer, dirs, src, tgt, *estep.to_fixed(rng.random(n)))
    by_bucket: dict[int, list] = {}
    for bucket, data in mstep.payloads(buffer, 3):
        by_bucket.setdefault(bucket, []).append((bucket, data))
    lex = tmp_path / "lex"
    reduce = mstep.make_reducer(str(lex), 3, min_prob=tables.MIN_PROB, prune_below=None)
    for index in range(3):
        list(reduce(index, iter(by_bucket.get(index, []))))
    dirs_ = ("forward", "reverse")
    seg = tables.read_worker_tables(str(lex), dirs_)
    whole = tables.tables_from_arrow(tables.read_table_arrow(str(lex)), dirs_)
    ask = np.unique(np.concatenate([(rng.integers(0, 210, 3000).astype(np.int64) << 32) | rng.integers(0, 160, 3000),
                                    whole["forward"].keys[::2], whole["reverse"].keys[::3]]))
    for d in dirs_:
        assert np.array_equal(seg[d].keys, whole[d].keys) and np.array_equal(seg[d].probs, whole[d].probs)
        assert (seg[d].local(ask) > tables.MIN_PROB).sum() > 500

    part = pq.read_table(lex / mstep.part_name(1))
    pq.write_table(part.replace_schema_metadata(None), lex / mstep.part_name(1))
    old = tables.read_worker_tables(str(lex), dirs_)
    for d in dirs_:
        assert np.array_equal(old[d].keys, whole[d].keys) and np.array_equal(old[d].probs, whole[d].probs)


def test_a_table_with_the_same_keys_is_read_as_probabilities_only(tmp_path):
    """The next table with the same keys (equal key digests in the files' metadata) shares the previous
    table's keys and merge and reads only its probabilities; the result equals a whole read. A table
    whose keys differ is not taken for one."""
    from spark_align.engine import estep, mstep
    from spark_align.kernels import counts

    rng = np.random.default_rng(5)
    n = 5000
    dirs = rng.integers(0, 2, n).astype(np.int8)
    src, tgt = rng.integers(0, 300, n).astype(np.int32), rng.integers(0, 250, n).astype(np.int32)
    dirs_ = ("forward", "reverse")

    def write_table(name, keep):
        buffer = counts.CountBuffer()
        mstep.fold_rows(buffer, dirs[keep], src[keep], tgt[keep], *estep.to_fixed(rng.random(int(keep.sum()))))
        lex = tmp_path / name
        reduce = mstep.make_reducer(str(lex), 3, min_prob=tables.MIN_PROB, prune_below=None)
        by_bucket: dict[int, list] = {}
        for bucket, data in mstep.payloads(buffer, 3):
            by_bucket.setdefault(bucket, []).append((bucket, data))
        for index in range(3):
            list(reduce(index, iter(by_bucket.get(index, []))))
        return str(lex)

    everything = np.ones(n, bool)
    first, second = write_table("a", everything), write_table("b", everything)
    fewer = write_table("c", rng.random(n) < 0.9)
    layout_a = tables.TableLayout.read(first)
    tables.read_worker_tables(first, dirs_, layout=layout_a)
    layout_b, layout_c = tables.TableLayout.read(second), tables.TableLayout.read(fewer)
    assert layout_a.same_keys(layout_b, dirs_) and not layout_a.same_keys(layout_c, dirs_)
    got = tables.read_worker_tables(second, dirs_, layout=layout_b, previous=layout_a)
    whole = tables.tables_from_arrow(tables.read_table_arrow(second), dirs_)
    for d in dirs_:
        assert np.array_equal(got[d].keys, whole[d].keys) and np.array_equal(got[d].probs, whole[d].probs)
        assert not np.array_equal(got[d].probs, tables.read_worker_tables(first, dirs_)[d].probs)
    # Through TableSource, as E-step tasks see it: the second read reuses the first's keys, and the
    # arrays the worker kept for the first table's keys (accumulators) are kept for it; a table with
    # other keys frees them.
    one = tables.TableSource(first, dirs_, (300, 250), "t1").value
    tables.worker_scratch()["sized by keys"] = spare = np.zeros(len(one["forward"].keys))
    two = tables.TableSource(second, dirs_, (300, 250), "t2").value
    assert two["forward"].keys is one["forward"].keys
    assert tables.worker_scratch()["sized by keys"] is spare
    three = tables.TableSource(fewer, dirs_, (300, 250), "t3").value
    assert "sized by keys" not in tables.worker_scratch()
    want = tables.tables_from_arrow(tables.read_table_arrow(fewer), dirs_)
    for d in dirs_:
        assert np.array_equal(three[d].keys, want[d].keys) and np.array_equal(three[d].probs, want[d].probs)


def test_shipping_is_not_part_of_the_resume_key_but_pruning_is():
    c = CorpusConfig(path="x.parquet")
    base = RunConfig(corpus=c).training_key()
    assert RunConfig(corpus=c, shipping="join", table_budget_mb=1.0).training_key() == base
    assert RunConfig(corpus=c, prune_below=1e-4).training_key() != base
    # run.json files written before these options existed still resume
    old = RunConfig(corpus=c).to_dict()
    for key in ("shipping", "table_budget_mb", "prune_below"):
        old.pop(key)
    assert RunConfig.from_dict(old).training_key() == base


# -- the Spark job ---------------------------------------------------------------------------
def _tables_by_iteration(run_dir: str) -> dict[str, object]:
    out = {}
    for ckpt in RunStore(run_dir).checkpoints():
        stage_dir = f"{ckpt.stage_index:02d}-{ckpt.model}"
        out[f"{stage_dir}/{ckpt.iteration}"] = read_table(run_dir, stage_dir, ckpt.iteration)
    return out


def _retrain(spark, base_run: str, new_run: str, cfg: RunConfig) -> dict[str, object]:
    """Train ``cfg`` again on ``base_run``'s ingested corpus (copied), from the uniform start."""
    os.makedirs(new_run)
    shutil.copytree(os.path.join(base_run, "encoded"), os.path.join(new_run, "encoded"))
    store = RunStore(new_run)
    trainer = em.Trainer(spark, cfg, store, RunStore(base_run).read_json("encoded.json"),
                         fingerprint="test", log=lambda _: None)
    trainer.train(em.TrainState(0, 0, None, {}))
    return _tables_by_iteration(new_run)


def _join_task_payloads(tmp_path, run_dir: str, table, flush_keys: int):
    """One join-path E-step task over every unit of ``run_dir`` with ``table``, in-process (routes and
    lookups as ``routed_records`` does them): (its payload records, the lexical sums they add up to as (keys,
    hi, lo))."""
    import fsspec

    from spark_align.engine import mstep
    from spark_align.kernels import counts
    from spark_align.models.ibm1 import IBM1

    store = RunStore(run_dir)
    units = mstep.block_units(store)
    blocks_url = store.spark_path("encoded", "blocks")
    fs, _root = fsspec.core.url_to_fs(blocks_url)
    unit_keys = {u: shipping.unit_dictionary(fs, path, rg) for u, (path, rg) in enumerate(units)}
    routed = routed_records(tmp_path, unit_keys, shipping.bucket_entries(table), n_buckets=3)
    model, directions = IBM1(), ("forward", "reverse")
    estep = shipping.make_join_estep(model, directions, {d: model.init_dense(None) for d in directions},
                                     blocks_url=blocks_url, units=units, n_tasks=1, n_buckets=3,
                                     flush_keys=flush_keys)
    records = [data for _bucket, data in estep(0, [(u, r) for u in sorted(routed) for r in routed[u]])]
    buffer = counts.CountBuffer()
    for data in records:
        buffer.add_payload(data)
    keys, hi, lo = buffer.result()
    lexical = ((keys >> 32) & np.int64(2 ** 30 - 1)) >= 2  # not the dense statistics or the scalars
    return records, (keys[lexical], hi[lexical], lo[lexical])


@pytest.mark.slow
def test_join_and_broadcast_shipping_give_bit_identical_tables_and_pruning(spark, tmp_path, monkeypatch):
    monkeypatch.setattr(ingest, "PAIRS_PER_ROW_GROUP", 128)  # two blocks per unit: four units, not one
    generated = synthetic.generate(400, seed=5, src_vocab=300, tgt_vocab=300).select(["source", "target"])
    cfg = config(CorpusConfig(path=write_parquet(tmp_path, generated)), "ibm1:2,hmm:1", block_size=64,
                 shipping="broadcast")
    base = str(tmp_path / "base")
    store = RunStore(base)
    store.write_json("encoded.json", dataclasses.asdict(ingest.ingest(spark, cfg, store)))
    # One thread per E-step task (local mode's default is one task on every core): four tasks, reducers.
    spark.conf.set(em.THREADS_CONF, "1")
    try:
        want = _retrain(spark, base, str(tmp_path / "broadcast"), cfg)
        # One E-step task per core instead of two: other task boundaries, the same tables bit for bit.
        spark.conf.set(em.TASKS_PER_CORE_CONF, "1")
        one_per_core = _retrain(spark, base, str(tmp_path / "one-per-core"), cfg)
    finally:
        spark.conf.unset(em.TASKS_PER_CORE_CONF)
        spark.conf.unset(em.THREADS_CONF)
    base_broadcast = str(tmp_path / "broadcast")
    assert len(want) == 3

    assert sorted(one_per_core) == sorted(want) and all(one_per_core[k].equals(want[k]) for k in want)
    # Two and three threads per E-step task (local[2]: one task, its units shared out as each thread
    # is free, one accumulator set per thread, added together): the same tables bit for bit.
    assert len(mstep.block_units(RunStore(base))) == 4  # units enough for three threads
    for threads in (None, "3"):  # None: local mode's default, as many as the cores (two)
        if threads is not None:
            spark.conf.set(em.THREADS_CONF, threads)
        try:
            threaded = _retrain(spark, base, str(tmp_path / f"threads-{threads or 'default'}"), cfg)
        finally:
            spark.conf.unset(em.THREADS_CONF)
        assert sorted(threaded) == sorted(want) and all(threaded[k].equals(want[k]) for k in want), threads
    by_default = manifest(str(tmp_path / "threads-default"), "00-ibm1", 2)["metrics"]["forward"]
    assert (by_default["estep_threads"], by_default["estep_tasks"]) == (2, 1)
    threaded = manifest(str(tmp_path / "threads-3"), "00-ibm1", 2)["metrics"]["forward"]
    assert (threaded["estep_threads"], threaded["estep_tasks"]) == (3, 1)
    assert manifest(base_broadcast, "00-ibm1", 2)["metrics"]["forward"]["estep_tasks"] == 4
    # That one task wrote the table itself (nothing shuffled): the reducers' files, byte for byte.
    assert threaded["mstep_by"] == "estep task"
    # the first iteration, from the constant initial table, runs one thread per task, through reducers
    first = manifest(str(tmp_path / "threads-3"), "00-ibm1", 1)["metrics"]["forward"]
    assert (first["estep_threads"], first["estep_tasks"], first["mstep_by"]) == (1, 4, "reducers")
    assert manifest(base_broadcast, "00-ibm1", 2)["metrics"]["forward"]["mstep_by"] == "reducers"
    for stage, iteration in (("00-ibm1", 1), ("00-ibm1", 2), ("01-hmm", 1)):
        assert (manifest(str(tmp_path / "threads-3"), stage, iteration)["table"]["crc32"]
                == manifest(base_broadcast, stage, iteration)["table"]["crc32"])
    with pytest.raises(ConfigError, match="estepTasksPerCore must be a whole number"):
        em.tasks_per_core("0")
    with pytest.raises(ConfigError, match="estepTasksPerCore must be a whole number"):
        em.tasks_per_core("two")

    # auto with a budget one entry too small for the first table -> join for every later iteration;
    # with pruning at 0, which removes nothing (every entry is >= 1e-12), through the pruning path
    n_entries = want["00-ibm1/1"].num_rows
    budget = (n_entries * shipping.BYTES_PER_ENTRY - 1) / 2 ** 20
    joined = str(tmp_path / "join")
    got = _retrain(spark, base, joined, dataclasses.replace(cfg, shipping="auto", table_budget_mb=budget,
                                                            prune_below=0.0))
    assert sorted(got) == sorted(want)
    for key in want:
        for col in ("dir", "src", "tgt", "prob"):
            assert np.array_equal(got[key].column(col).to_numpy(), want[key].column(col).to_numpy()), (key, col)
    assert manifest(joined, "00-ibm1", 1)["metrics"]["forward"]["shipping"] == "broadcast"  # uniform: a constant
    assert manifest(joined, "00-ibm1", 2)["metrics"]["forward"]["shipping"] == "join"
    assert manifest(joined, "00-ibm1", 1)["metrics"]["forward"]["pruned"]["removed"] == 0
    assert manifest(base_broadcast, "00-ibm1", 2)["metrics"]["forward"]["shipping"] == "broadcast"
    # the join path's lookup tasks report their seconds; no lookup task runs on the broadcast path
    assert manifest(joined, "00-ibm1", 2)["metrics"]["forward"]["route_lookup_seconds"] > 0
    assert manifest(base_broadcast, "00-ibm1", 2)["metrics"]["forward"]["route_lookup_seconds"] == 0
    for d in ("forward", "reverse"):
        assert (manifest(joined, "01-hmm", 1)["metrics"][d]["loglik"]
                == manifest(base_broadcast, "01-hmm", 1)["metrics"][d]["loglik"])
    assert os.path.exists(os.path.join(joined, *shipping.routes_commit(em.n_reducers(spark)).split("/")))

    # A join task whose counts reach joinTaskKeys distinct keys sends them on and starts again: more
    # payloads, the same sums (in-process, over the units' joined entries); and through Spark, with the
    # setting at a few hundred keys, the same tables bit for bit.
    sent = {limit: _join_task_payloads(tmp_path / f"task-{limit}", base, want["00-ibm1/1"], limit)
            for limit in (300, 10 ** 9)}
    assert len(sent[300][0]) > len(sent[10 ** 9][0]) + 10
    for a, b in zip(sent[300][1], sent[10 ** 9][1]):
        assert np.array_equal(a, b)
    spark.conf.set(shipping.TASK_KEYS_CONF, "300")
    try:
        flushed = _retrain(spark, base, str(tmp_path / "join-flushed"), dataclasses.replace(cfg, shipping="join"))
    finally:
        spark.conf.unset(shipping.TASK_KEYS_CONF)
    assert sorted(flushed) == sorted(want) and all(flushed[k].equals(want[k]) for k in want)
    with pytest.raises(ConfigError, match="joinTaskKeys must be a whole number"):
        em.whole_number_setting(shipping.TASK_KEYS_CONF, "-3")

    # pruning at 1e-2 drops entries: only those >= threshold stay, and the manifest says how many went
    threshold = 1e-2
    got = _retrain(spark, base, str(tmp_path / "prune"),
                   dataclasses.replace(cfg, prune_below=threshold, stages=cfg.stages[:1]))
    full, kept = want["00-ibm1/1"], got["00-ibm1/1"]
    probs = full.column("prob").to_numpy()
    assert kept.num_rows == int(np.sum(probs >= threshold)) < full.num_rows
    report = manifest(str(tmp_path / "prune"), "00-ibm1", 1)["metrics"]
    removed = sum(report[d]["pruned"]["removed"] for d in ("forward", "reverse"))
    assert removed == full.num_rows - kept.num_rows
    mass = sum(report[d]["pruned"]["removed_mass"] for d in ("forward", "reverse"))
    assert mass == pytest.approx(float(probs[probs < threshold].sum()), rel=1e-9)
    assert "loglik_per_word_change" in manifest(str(tmp_path / "prune"), "00-ibm1", 2)["metrics"]["forward"]


@pytest.mark.slow
def test_join_shipping_matches_nltk_ibm1(spark, tmp_path):
    """Per-block shipping trains the same t(target | source) as nltk.translate.IBMModel1 (to 1e-9)."""
    from nltk.translate import AlignedSent, IBMModel1

    s, t = write_text(tmp_path, TOY_SOURCE, TOY_TARGET)
    run_dir = str(tmp_path / "run")
    train(spark, config(CorpusConfig(source_text=s, target_text=t), "ibm1:3", directions="forward",
                        shipping="join"), run_dir, log=lambda _: None)
    assert manifest(run_dir, "00-ibm1", 3)["metrics"]["forward"]["shipping"] == "join"
    reference = IBMModel1([AlignedSent(b.split(), a.split()) for a, b in zip(TOY_SOURCE, TOY_TARGET)], 3)
    vocab = {}
    for side in ("source", "target"):
        v = pq.read_table(os.path.join(run_dir, "vocab", side))
        vocab[side] = dict(zip(v.column("id").to_pylist(), v.column("word").to_pylist()))
    table = read_table(run_dir, "00-ibm1", 3).to_pydict()
    for si, ti, p in zip(table["src"], table["tgt"], table["prob"]):
        want = reference.translation_table[vocab["target"][ti]][None if si == 0 else vocab["source"][si]]
        assert p == pytest.approx(want, rel=1e-9, abs=1e-15)
    assert ragged.NULL_ID == 0


@pytest.mark.slow
def test_the_output_pass_decodes_per_unit_as_with_the_whole_table(spark, tmp_path):
    """With per-unit shipping, the output pass's decoding tasks get their units' entries the same way
    (no Python worker reads the whole table): the output is the whole-table decoding's, row for row, and
    the decoded rows it went through are removed once the output is written."""
    s, t = write_text(tmp_path, TOY_SOURCE * 3, TOY_TARGET * 3)
    outputs = {}
    for path in ("join", "broadcast"):
        run_dir = str(tmp_path / path)
        train(spark, config(CorpusConfig(source_text=s, target_text=t), "ibm1:2,hmm:1", block_size=4,
                            shipping=path), run_dir, log=lambda _: None)
        outputs[path] = read_output(run_dir)
        assert not os.path.exists(os.path.join(run_dir, shipping.DECODED))
    assert outputs["join"].num_rows == len(TOY_SOURCE) * 3
    assert outputs["join"].equals(outputs["broadcast"])
