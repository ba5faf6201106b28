"""The exact count reduction and the M-step normalisation (kernels.counts), without Spark."""
import numpy as np
import pytest

from spark_align.engine import estep, mstep
from spark_align.kernels import counts

HI, LO = estep.HI_SCALE, estep.LO_SCALE


def _rows(rng, n, n_src=50, n_tgt=60):
    dirs = rng.integers(0, 2, n).astype(np.int8)
    src = rng.integers(-2, n_src, n).astype(np.int32)
    tgt = rng.integers(0, n_tgt, n).astype(np.int32)
    values = rng.random(n) * rng.choice([1e-6, 1.0, 300.0], n)
    return dirs, src, tgt, values


def test_keys_round_trip_and_sort_as_dir_src_tgt():
    rng = np.random.default_rng(0)
    dirs, src, tgt, _ = _rows(rng, 5000)
    src[:3] = counts.MAX_ID - 1
    tgt[:3] = counts.MAX_ID - 1
    keys = counts.row_keys(dirs, src, tgt)
    back = counts.split_keys(keys)
    for a, b in zip(back, (dirs, src, tgt)):
        np.testing.assert_array_equal(a, b)
    order = np.argsort(keys, kind="stable")
    np.testing.assert_array_equal(order, np.lexsort((tgt, src, dirs)))


@pytest.mark.parametrize("make", [lambda: counts.CountBuffer(compact_rows=777), lambda: counts.HashCounts(16)],
                         ids=["sorting buffer", "hash table"])
def test_folding_equals_one_exact_integer_sum_whatever_the_order(make):
    """Folding in pieces (forced by a tiny compaction size, or a hash table that has to double many
    times) gives the integer sums of a plain dict."""
    rng = np.random.default_rng(1)
    dirs, src, tgt, values = _rows(rng, 20000)
    hi, lo = estep.to_fixed(values)
    expected: dict[tuple, list[int]] = {}
    for row in zip(dirs.tolist(), src.tolist(), tgt.tolist(), hi.tolist(), lo.tolist()):
        acc = expected.setdefault(row[:3], [0, 0])
        acc[0] += row[3]
        acc[1] += row[4]
    for perm_seed in (2, 3):
        perm = np.random.default_rng(perm_seed).permutation(len(dirs))
        buf = make()
        for chunk in np.array_split(perm, 41):
            mstep.fold_rows(buf, dirs[chunk], src[chunk], tgt[chunk], hi[chunk], lo[chunk])
        keys, h, lo_sum = buf.result()
        d, s, t = counts.split_keys(keys)
        got = {(int(a), int(b), int(c)): [int(x), int(y)] for a, b, c, x, y in zip(d, s, t, h, lo_sum)}
        assert got == expected
        assert np.all(np.diff(keys) > 0)


def test_hash_counts_when_empty_and_refusing_negative_keys():
    assert all(len(a) == 0 for a in counts.HashCounts().result())
    with pytest.raises(ValueError, match="non-negative"):
        counts.HashCounts().add(np.array([-3], np.int64), np.zeros(1, np.int64), np.zeros(1, np.int64))


def test_pair_rows_are_row_keys_and_fixed_point_in_one_pass():
    from spark_align.kernels import ragged

    rng = np.random.default_rng(22)
    src, tgt = rng.integers(0, 70000, 3000), rng.integers(0, 70000, 3000)
    values = rng.random(3000) * np.exp(rng.uniform(-30, 8, 3000))
    for d in (0, 1):
        got = counts.pair_rows(d, ragged.make_key(src, tgt), values, hi_scale=estep.HI_SCALE, lo_scale=estep.LO_SCALE)
        want = (counts.row_keys(np.full(len(src), d, np.int8), src, tgt), *estep.to_fixed(values))
        for a, b in zip(got, want):
            np.testing.assert_array_equal(a, b)
    with pytest.raises(ValueError, match="word ids must stay below"):
        counts.pair_rows(0, ragged.make_key(np.array([counts.MAX_ID]), np.array([1])), np.ones(1),
                         hi_scale=estep.HI_SCALE, lo_scale=estep.LO_SCALE)


def test_payloads_partition_rows_by_conditioning_word_and_round_trip():
    rng = np.random.default_rng(4)
    dirs, src, tgt, values = _rows(rng, 8000)
    hi, lo = estep.to_fixed(values)
    buf = counts.CountBuffer()
    mstep.fold_rows(buf, dirs, src, tgt, hi, lo)
    keys, h, lo_sum = buf.result()
    seen_cond: dict[tuple[int, int], int] = {}
    parts = []
    for bucket, data in mstep.payloads(buf, 5):
        k, a, b = counts.decode_rows(bytearray(data))  # Spark hands binary values back as bytearray
        parts.append((k, a, b))
        d, s, t = counts.split_keys(k)
        for di, si, ti in zip(d.tolist(), s.tolist(), t.tolist()):
            if si >= 0:  # lexical: all rows of one (direction, conditioning word) in one bucket
                cond = (di, si if di == 0 else ti)
                assert seen_cond.setdefault(cond, bucket) == bucket, "a conditioning word split over buckets"
    k, a, b = (np.concatenate(x) for x in zip(*parts))
    order = np.argsort(k)
    np.testing.assert_array_equal(k[order], keys)
    np.testing.assert_array_equal(a[order], h)
    np.testing.assert_array_equal(b[order], lo_sum)


def test_normalise_gives_conditional_probabilities_per_direction():
    # forward t(tgt | src): src 1 co-occurs with tgt 1 (count 3) and tgt 2 (count 1);
    # reverse t(src | tgt): tgt 1 with src 0 (NULL, count 1) and src 1 (count 1).
    dirs = np.array([0, 0, 1, 1, 0, 1], np.int8)
    src = np.array([1, 1, 0, 1, -1, -2], np.int32)
    tgt = np.array([1, 2, 1, 1, 4, 0], np.int32)
    hi, lo = estep.to_fixed(np.array([3.0, 1.0, 1.0, 1.0, 9.0, -5.0]))
    keys, h, lo_sum = counts.reduce_sorted(counts.row_keys(dirs, src, tgt), hi, lo)
    d, s, t, p = counts.normalise(keys, h, lo_sum, hi_scale=HI, lo_scale=LO, min_prob=1e-12)
    got = {(int(a), int(b), int(c)): float(x) for a, b, c, x in zip(d, s, t, p)}
    assert got == {(0, 1, 1): 0.75, (0, 1, 2): 0.25, (1, 0, 1): 0.5, (1, 1, 1): 0.5}


def _normalise_with_numpy(keys, hi, lo, min_prob):
    """A plain rendering of the M-step: totals per conditioning word with np.add.at."""
    dirs, src, tgt = counts.split_keys(keys)
    lex = src >= 0
    dirs, src, tgt, hi, lo = dirs[lex], src[lex], tgt[lex], hi[lex], lo[lex]
    total = np.empty(len(hi))
    for d, cond in ((0, src), (1, tgt)):
        sel = dirs == d
        if sel.any():
            t_hi, t_lo = np.zeros(int(cond[sel].max()) + 1, np.int64), np.zeros(int(cond[sel].max()) + 1, np.int64)
            np.add.at(t_hi, cond[sel], hi[sel])
            np.add.at(t_lo, cond[sel], lo[sel])
            total[sel] = counts.from_fixed(t_hi, t_lo, HI, LO)[cond[sel]]
    return dirs, src, tgt, np.maximum(counts.from_fixed(hi, lo, HI, LO) / total, 1e-12)


def test_normalise_equals_a_plain_numpy_rendering_bit_for_bit():
    rng = np.random.default_rng(14)
    dirs, src, tgt, values = _rows(rng, 30000, n_src=400, n_tgt=500)
    values = values * rng.choice([1e-18, 1e-3, 1.0, 1e6], len(values))  # tiny (floored) to large counts
    keys, h, lo_sum = counts.reduce_sorted(counts.row_keys(dirs, src, tgt), *estep.to_fixed(values))
    got = counts.normalise(keys, h, lo_sum, hi_scale=HI, lo_scale=LO, min_prob=1e-12)
    want = _normalise_with_numpy(keys, h, lo_sum, 1e-12)
    assert len(got[0]) == len(want[0]) > 20000 and (got[3] == 1e-12).any()
    for g, w in zip(got, want):
        assert g.dtype == w.dtype
        np.testing.assert_array_equal(g, w)


def test_normalise_floors_tiny_probabilities():
    dirs = np.zeros(2, np.int8)
    src = np.ones(2, np.int32)
    tgt = np.array([1, 2], np.int32)
    hi, lo = estep.to_fixed(np.array([1.0, 1e-16]))
    keys, h, lo_sum = counts.reduce_sorted(counts.row_keys(dirs, src, tgt), hi, lo)
    _, _, _, p = counts.normalise(keys, h, lo_sum, hi_scale=HI, lo_scale=LO, min_prob=1e-12)
    assert p[1] == 1e-12 and p[0] == pytest.approx(1.0)


def test_table_aligned_task_counts_equal_the_plain_buffer():
    """TaskCounts (table-aligned accumulators + buffer for keys the table lacks) emits the same sums."""
    from spark_align.engine.tables import DirectionTable

    rng = np.random.default_rng(5)
    table_keys = np.unique((rng.integers(0, 40, 900).astype(np.int64) << 32) | rng.integers(0, 40, 900))
    tabs = {"forward": DirectionTable(table_keys, rng.random(len(table_keys))),
            "reverse": DirectionTable(table_keys[::2].copy(), rng.random(len(table_keys[::2])))}
    task, plain = mstep.TaskCounts(tabs), counts.CountBuffer()
    as_rows, drained = mstep.TaskCounts(tabs), counts.CountBuffer()  # the same counts, taken as sorted runs
    by_bucket = mstep.TaskCounts(tabs)  # the same counts, grouped by bucket for the task's own M-step
    for step in range(6):
        dict_keys = np.unique((rng.integers(0, 45, 300).astype(np.int64) << 32) | rng.integers(0, 45, 300))
        for d, name in enumerate(("forward", "reverse")):
            emitted = rng.random(len(dict_keys)) < 0.9
            values = rng.random(len(dict_keys)) * 3
            other = (np.array([-1, -2], np.int32), np.array([d + 3, 0], np.int32), np.array([0.5, -7.0]))
            task.add(dict_keys, tabs[name].positions(dict_keys), d, emitted, values, other)
            by_bucket.add(dict_keys, tabs[name].positions(dict_keys), d, emitted, values, other)
            as_rows.add(dict_keys, tabs[name].positions(dict_keys), d, emitted, values, other)
            src, tgt = dict_keys[emitted] >> 32, dict_keys[emitted] & 0xFFFFFFFF
            all_src = np.concatenate([src, other[0]])
            all_tgt = np.concatenate([tgt, other[1]])
            hi, lo = estep.to_fixed(np.concatenate([values[emitted], other[2]]))
            mstep.fold_rows(plain, np.full(len(all_src), d, np.int8), all_src, all_tgt, hi, lo)
        if step % 2:  # taken twice along the way: each time what was added since, and nothing after
            for run in as_rows.rows():
                assert np.all(np.diff(run[0]) > 0)
                drained.add(*run)
            assert all(len(run[0]) == 0 for run in as_rows.rows())
    records = list(task.payloads(3))
    # what a reducer folds from the task's records of its bucket, the task's own M-step has at hand
    assert sorted(bucket for bucket, _ in records) == [0, 1, 2]
    for bucket, data in records:
        reducer = counts.CountBuffer()
        reducer.add_payload(data)
        grouped = by_bucket.bucket_sums(bucket, 3)
        for g, w in zip(grouped, reducer.result()):
            np.testing.assert_array_equal(g, w)
        assert np.all(counts.buckets_of(grouped[0], 3) == bucket)
    by_bucket.clear()
    assert all(len(run[0]) == 0 for run in by_bucket.rows())  # emptied
    got = [counts.decode_rows(data) for _, data in records]
    k, a, b = (np.concatenate(x) for x in zip(*got))
    order = np.argsort(k)
    keys, h, lo_sum = plain.result()
    np.testing.assert_array_equal(k[order], keys)
    np.testing.assert_array_equal(a[order], h)
    np.testing.assert_array_equal(b[order], lo_sum)
    for g, w in zip(drained.result(), (keys, h, lo_sum)):
        np.testing.assert_array_equal(g, w)


def test_add_at_positions_equals_splitting_and_adding_with_numpy():
    rng = np.random.default_rng(9)
    n, size = 3000, 5000
    pos = rng.permutation(size)[:n]
    hit, emitted = rng.random(n) < 0.8, rng.random(n) < 0.9
    values = rng.random(n) * rng.choice([1e-9, 1.0, 1e4], n)
    acc, touched = np.zeros((size, 2), np.int64), np.zeros(size, bool)
    acc[:, 0] = 7
    miss = counts.add_at_positions(pos, hit, emitted, values, acc, touched, hi_scale=HI, lo_scale=LO)
    got = [acc[:, 0], acc[:, 1], touched]
    want = [np.full(size, 7, np.int64), np.zeros(size, np.int64), np.zeros(size, bool)]
    sel = hit & emitted
    hi, lo = estep.to_fixed(values[sel])
    want[0][pos[sel]] += hi
    want[1][pos[sel]] += lo
    want[2][pos[sel]] = True
    for a, b in zip(got, want):
        np.testing.assert_array_equal(a, b)
    np.testing.assert_array_equal(miss, np.flatnonzero(emitted & ~hit))


def test_galloping_positions_equal_searchsorted():
    from spark_align.kernels import lookup

    rng = np.random.default_rng(6)
    table = np.unique(rng.integers(0, 10 ** 6, 5000).astype(np.int64))
    for keys in (np.unique(rng.integers(-5, 10 ** 6 + 5, 700)).astype(np.int64),  # sorted, some absent
                 rng.integers(0, 10 ** 6, 300).astype(np.int64),                 # unsorted
                 np.array([], np.int64), table[[0, -1]]):
        pos, hit = lookup.positions(table, keys)
        ref = np.minimum(np.searchsorted(table, keys), len(table) - 1)
        np.testing.assert_array_equal(hit, table[ref] == keys)
        np.testing.assert_array_equal(pos[hit], ref[hit])
        assert np.all((pos >= 0) & (pos < len(table)))
    pos, hit = lookup.positions(np.array([], np.int64), np.array([3, 4], np.int64))
    assert not hit.any() and list(pos) == [0, 0]


@pytest.mark.parametrize("indexed", [False, True], ids=["galloping", "hash index"])
def test_hinted_lookup_equals_a_fresh_search_whatever_the_hints(indexed):
    """Whether keys are searched for by galloping or through the table's hash index (then galloping
    for the insertion points of absent ones), every output is the same, with or without hints."""
    from spark_align.kernels import lookup

    rng = np.random.default_rng(8)
    table = np.unique(rng.integers(0, 10 ** 6, 5000).astype(np.int64))
    values = rng.random(len(table))
    keys = np.concatenate([np.unique(rng.integers(-5, 10 ** 6 + 5, 700)),  # two sorted runs, some absent
                           np.unique(rng.integers(0, 10 ** 6, 300))]).astype(np.int64)
    keys = np.concatenate([keys, rng.choice(table, 200)])  # and a run of present keys in no order
    index = lookup.key_index(table) if indexed else None
    want = lookup.find(table, values, keys, 1e-12)
    pos, hit, got, points, searched = lookup.find_hinted(table, values, keys, 1e-12, None, index)
    assert searched == len(keys)
    for a, b in zip(want, (pos, hit, got)):
        np.testing.assert_array_equal(a, b)
    np.testing.assert_array_equal(points, np.searchsorted(table, keys))  # insertion points, unclipped
    # Exact hints: nothing is searched for; wrong ones (shifted, negative, past the end) are found out.
    assert lookup.find_hinted(table, values, keys, 1e-12, points, index)[4] == 0
    bad = points.copy()
    bad[::5] += 1
    bad[1], bad[2] = -7, len(table) + 9
    wrong = np.count_nonzero(bad != points)
    pos, hit, got, again, searched = lookup.find_hinted(table, values, keys, 1e-12, bad, index)
    assert searched == wrong
    for a, b in zip(want, (pos, hit, got)):
        np.testing.assert_array_equal(a, b)
    np.testing.assert_array_equal(again, points)
    with pytest.raises(ValueError, match="hints for"):
        lookup.find_hinted(table, values, keys, 1e-12, points[:-1])
    empty = np.zeros(0, np.int64)
    _pos, hit, got, _, _ = lookup.find_hinted(empty, np.zeros(0), keys, 1e-12, None, lookup.key_index(empty))
    assert not hit.any() and (got == 1e-12).all()


def test_a_table_indexes_its_keys_only_when_worth_it(monkeypatch):
    """A table builds its hash index for a search of many keys (a block dictionary against the table),
    not for a few, nor when it is too large for the index; the results are the same every way."""
    from spark_align.engine.tables import DirectionTable
    from spark_align.kernels import lookup

    rng = np.random.default_rng(9)
    table_keys = np.unique(rng.integers(0, 10 ** 7, 20000).astype(np.int64))
    probs = rng.random(len(table_keys))
    many = np.unique(np.concatenate([rng.choice(table_keys, 3000), rng.integers(0, 10 ** 7, 500)]))
    few = many[::100]
    want = lookup.find(table_keys, probs, many, 1e-12)
    table = DirectionTable(table_keys, probs)
    table.find_hinted(few, None)
    assert not table._index
    (pos, hit), got, _, _ = table.find_hinted(many, None)
    assert "slots" in table._index
    for a, b in zip(want, (pos, hit, got)):
        np.testing.assert_array_equal(a, b)
    monkeypatch.setattr(lookup, "MAX_INDEXED", len(table_keys))
    large = DirectionTable(table_keys, probs)
    (pos, hit), got, _, _ = large.find_hinted(many, None)
    assert not large._index
    for a, b in zip(want, (pos, hit, got)):
        np.testing.assert_array_equal(a, b)


def test_hints_encoding_round_trips_and_refuses_damage():
    from spark_align.kernels import lookup

    points = np.array([0, 3, 257, 257, 900_000, 12, 13, 268, 2 ** 40], np.int64)  # steps 0..254 are one byte
    found = np.array([1, 0, 1, 1, 0, 0, 1, 1, 1], bool)
    stored = lookup.StoredHints(points, found, bytes(range(1, 17)), exact=True)
    data = lookup.encode_hints(stored)
    back = lookup.decode_hints(data)
    np.testing.assert_array_equal(back.points, points)
    np.testing.assert_array_equal(back.found, found)
    assert back.keys_id == bytes(range(1, 17)) and back.exact
    plain = lookup.decode_hints(lookup.encode_hints(lookup.StoredHints(points)))
    assert plain.keys_id == b"" and not plain.exact and not plain.found.any()
    assert len(lookup.decode_hints(lookup.encode_hints(lookup.StoredHints(np.zeros(0, np.int64)))).points) == 0
    flipped = bytearray(data)
    flipped[len(data) // 2] ^= 0x10                              # one bit inside: the CRC-32 finds it
    for damaged in (data[:-1], data + b"x", b"junk" + data[4:], data[:10], bytes(flipped)):
        with pytest.raises(ValueError):
            lookup.decode_hints(damaged)
    with pytest.raises(ValueError, match="do not fit"):
        lookup.encode_hints(lookup.StoredHints(points, found[:-1]))


def test_stored_positions_give_the_lookup_values_and_are_guarded():
    """Positions taken as they are (a table with the same keys) give what a search gives; positions
    that cannot be those of a sorted block dictionary are refused before any is read."""
    from spark_align.kernels import lookup

    rng = np.random.default_rng(12)
    table = np.unique(rng.integers(0, 10 ** 6, 5000).astype(np.int64))
    values = rng.random(len(table))
    blocks = [np.unique(np.concatenate([rng.choice(table, n), rng.integers(-5, 10 ** 6 + 5, n)])).astype(np.int64)
              for n in (700, 1, 300)]  # each block sorted; present and absent keys
    keys = np.concatenate(blocks)
    sizes = [len(b) for b in blocks]
    _pos, hit, want, points, _ = lookup.find_hinted(table, values, keys, 1e-12, None)
    assert 0 < hit.sum() < len(keys)
    np.testing.assert_array_equal(lookup.gather_found(values, points, hit, sizes, 1e-12), want)
    for broken in ("past the end", "going back", "sizes"):
        bad, bad_sizes = points.copy(), list(sizes)
        first, second = np.flatnonzero(hit[:sizes[0]])[:2]
        if broken == "past the end":
            bad[first] = len(table)
        elif broken == "going back":
            bad[second] = bad[first]
        else:
            bad_sizes[0] -= 1
        assert lookup.gather_found(values, bad, hit, bad_sizes, 1e-12) is None, broken
    # Across blocks the positions start again (each block's dictionary is sorted on its own).
    assert points[sizes[0] + sizes[1]] < points[sizes[0] - 1]


def test_ids_beyond_the_key_range_are_refused():
    buf = counts.CountBuffer()
    with pytest.raises(ValueError, match="word ids must stay below"):
        mstep.fold_rows(buf, np.zeros(1, np.int8), np.array([counts.MAX_ID], np.int32), np.zeros(1, np.int32),
                        np.zeros(1, np.int64), np.zeros(1, np.int64))


def test_payload_rows_round_trip_at_the_extremes_and_joined():
    rng = np.random.default_rng(11)
    edge = np.array([0, 1, -1, 63, 64, -64, -65, 2 ** 31, -2 ** 31, 2 ** 62, -2 ** 62,
                     np.iinfo(np.int64).max, np.iinfo(np.int64).min], np.int64)
    keys = np.concatenate([np.sort(rng.integers(0, 2 ** 62, 500)), np.sort(rng.integers(0, 2 ** 62, 300)), edge])
    hi = np.concatenate([rng.integers(-2 ** 40, 2 ** 40, 800), edge])
    lo = np.concatenate([rng.integers(0, 2 ** 34, 800), edge[::-1]])
    first = counts.encode_rows(keys, hi, lo)
    empty = counts.encode_rows(keys[:0], hi[:0], lo[:0])
    second = counts.encode_rows(keys[:7], hi[:7], lo[:7])
    got = counts.decode_rows(bytearray(first + empty + second))  # Spark hands binary values back as bytearray
    for g, want in zip(got, (keys, hi, lo)):
        np.testing.assert_array_equal(g, np.concatenate([want, want[:7]]))
    assert all(len(a) == 0 for a in counts.decode_rows(b""))


@pytest.mark.parametrize("damage", ["truncate", "header", "extra"])
def test_damaged_payloads_are_refused(damage):
    data = counts.encode_rows(np.arange(50, dtype=np.int64) * 3, np.arange(50, dtype=np.int64),
                              np.full(50, 2 ** 33, np.int64))
    if damage == "truncate":
        data = data[:-3]
    elif damage == "header":  # says one row more than it holds
        data = np.array([51], "<i8").tobytes() + data[8:]
    else:  # bytes past the rows, inside the segment
        data = np.array([50, len(data) - 16 + 2], "<i8").tobytes() + data[16:] + b"\x00\x00"
    with pytest.raises(ValueError):
        counts.decode_rows(data)


def test_encode_by_bucket_equals_grouping_rows_then_encoding():
    """The compiled per-bucket encoder gives, for every bucket, the bytes of that bucket's rows (in
    their order) encoded on their own, with the bucket numbers of :func:`counts.buckets_of`."""
    rng = np.random.default_rng(31)
    dirs, src, tgt, values = _rows(rng, 6000)
    src[:50], src[50:60] = -1, -2  # dense and scalar rows
    keys = np.sort(counts.row_keys(dirs, src, tgt))
    hi, lo = rng.integers(-2 ** 40, 2 ** 40, len(keys)), rng.integers(0, 2 ** 33, len(keys))
    for n_buckets in (1, 7):
        bucket = counts.buckets_of(keys, n_buckets)
        segments = counts.encode_by_bucket(keys, hi, lo, n_buckets)
        assert sorted(segments) == sorted(set(bucket.tolist()))
        for b, data in segments.items():
            part = bucket == b
            assert data == counts.encode_rows(keys[part], hi[part], lo[part])
    assert counts.encode_by_bucket(keys[:0], hi[:0], lo[:0], 7) == {}


@pytest.mark.parametrize("d", [0, 1])
def test_encode_touched_equals_gathering_by_bucket_then_encoding(d):
    rng = np.random.default_rng(12 + d)
    table_keys = np.unique((rng.integers(0, 3000, 30000).astype(np.int64) << 32) | rng.integers(0, 3000, 30000))
    n = len(table_keys)
    acc = np.stack([rng.integers(0, 2 ** 36, n), rng.integers(0, 2 ** 33, n)], axis=1)
    touched = rng.random(n) < 0.3
    cond = (table_keys >> 32) if d == 0 else (table_keys & 0xFFFFFFFF)
    bucket = counts.bucket_of_cond(cond, d, 7)
    shift = (d << 62) + (2 << 32)
    segments = counts.encode_touched(touched, table_keys, d, 7, acc)
    assert sorted(segments) == sorted(set(bucket[touched].tolist()))
    for b, data in segments.items():
        want = np.flatnonzero(touched & (bucket == b))  # ascending table positions
        k, h, lo = counts.decode_rows(data)
        np.testing.assert_array_equal(k, table_keys[want] + shift)
        np.testing.assert_array_equal(h, acc[want, 0])
        np.testing.assert_array_equal(lo, acc[want, 1])
        assert np.array_equal(counts.buckets_of(k, 7), np.full(len(k), b))
    assert counts.encode_touched(np.zeros(n, bool), table_keys, d, 7, acc) == {}
    # the same rows, in one run of ascending keys
    k, h, lo = counts.touched_rows(touched, table_keys, d, acc)
    np.testing.assert_array_equal(k, table_keys[touched] + shift)
    np.testing.assert_array_equal(h, acc[touched, 0])
    np.testing.assert_array_equal(lo, acc[touched, 1])


def test_count_buffer_folds_payloads_and_arrays_alike():
    """Payloads stay encoded until a fold decodes them in place; the sums equal a fold of the arrays."""
    rng = np.random.default_rng(15)
    dirs, src, tgt, values = _rows(rng, 20000, n_src=300, n_tgt=300)
    hi, lo = estep.to_fixed(values)
    keys = counts.row_keys(dirs, src, tgt)
    want = counts.reduce_sorted(*(a[np.argsort(keys, kind="stable")] for a in (keys, hi, lo)))
    for compact_rows in (10 ** 9, 3000):
        buf = counts.CountBuffer(compact_rows=compact_rows)
        for i, chunk in enumerate(np.array_split(np.arange(len(keys)), 12)):
            part = counts.reduce_sorted(*(a[chunk][np.argsort(keys[chunk], kind="stable")] for a in (keys, hi, lo)))
            if i % 3:
                buf.add_payload(bytearray(counts.encode_rows(*part)))
            else:
                buf.add(*part)
        buf.add_payload(counts.encode_rows(keys[:0], hi[:0], lo[:0]))  # no rows: nothing to do
        assert buf.max_keys >= len(want[0])
        for g, w in zip(buf.result(), want):
            np.testing.assert_array_equal(g, w)
    # more sorted runs than a fold merges directly: folded as they come, the same sums
    buf = counts.CountBuffer(compact_rows=10 ** 9)
    for chunk in np.array_split(np.arange(len(keys)), 3 * counts.MERGE_RUNS):
        buf.add(*counts.reduce_sorted(*(a[chunk][np.argsort(keys[chunk], kind="stable")] for a in (keys, hi, lo))))
        assert len(buf._parts) < counts.MERGE_RUNS
    for g, w in zip(buf.result(), want):
        np.testing.assert_array_equal(g, w)
    with pytest.raises(ValueError):
        counts.CountBuffer().add_payload(b"\x01" * 10)


def test_merging_runs_that_cover_separate_ranges():
    """A task's forward and reverse runs cover separate key ranges: disjoint, nested, touching and
    overlapping runs, merged as they are decoded with and without folded arrays, give the plain sums."""
    rng = np.random.default_rng(41)
    dirs, src, tgt, values = _rows(rng, 12000, n_src=200, n_tgt=200)
    hi, lo = estep.to_fixed(values)
    keys = counts.row_keys(dirs, src, tgt)
    order = np.argsort(keys, kind="stable")
    keys, hi, lo = keys[order], hi[order], lo[order]
    cuts = [0, 1500, 1500, 4000, 6000, 12000]  # disjoint consecutive ranges, one empty
    runs = [(keys[a:b], hi[a:b], lo[a:b]) for a, b in zip(cuts, cuts[1:])]
    # and rows of the same keys again: a nested run and one spanning everything, sparse
    extra = [np.arange(2000, 3000, 7), np.arange(0, 12000, 13)]
    runs += [(keys[i], hi[i], lo[i]) for i in extra]
    every = np.concatenate([np.arange(a, b) for a, b in zip(cuts, cuts[1:])] + extra)
    want = counts.reduce_sorted(*(a[np.sort(every)] for a in (keys, hi, lo)))
    payloads = [counts.encode_rows(*counts.reduce_sorted(*r)) for r in runs]
    for folded_first in (False, True):
        if folded_first:  # the first run as folded arrays (run 0), the others as payloads
            got = counts._merge_payloads(counts.reduce_sorted(*runs[0]), payloads[1:], len(every))
        else:
            got = counts._merge_payloads(None, payloads[::-1], len(every))
        assert got is not None
        for g, w in zip(got, want):
            np.testing.assert_array_equal(g, w)


@pytest.mark.parametrize("compact_rows", [10 ** 9, 2500])
def test_payloads_are_merged_as_they_are_decoded(compact_rows):
    """Sorted payload segments are merged while they are decoded (no decoded copy); unsorted segments
    and more runs than MERGE_RUNS take the decode-and-sort path; all give the same sums."""
    rng = np.random.default_rng(16)
    dirs, src, tgt, values = _rows(rng, 30000, n_src=300, n_tgt=300)
    hi, lo = estep.to_fixed(values)
    keys = counts.row_keys(dirs, src, tgt)
    want = counts.reduce_sorted(*(a[np.argsort(keys, kind="stable")] for a in (keys, hi, lo)))

    def sorted_part(idx):
        return counts.reduce_sorted(*(a[idx][np.argsort(keys[idx], kind="stable")] for a in (keys, hi, lo)))

    chunks = np.array_split(rng.permutation(len(keys)), 40)
    few = [counts.encode_rows(*sorted_part(np.concatenate(chunks[i:i + 5]))) for i in range(0, 40, 5)]
    merged = counts._merge_payloads(None, few, len(keys))  # 8 sorted segments: merged as decoded
    assert merged is not None
    for g, w in zip(merged, want):
        np.testing.assert_array_equal(g, w)
    assert counts._merge_payloads(None, [counts.encode_rows(keys[c], hi[c], lo[c]) for c in chunks[:8]],
                                  sum(len(c) for c in chunks[:8])) is None  # unsorted: decode and sort
    cases = {
        "sorted, eight payloads": few,
        "sorted, joined in threes": [b"".join(counts.encode_rows(*sorted_part(c)) for c in chunks[i:i + 3])
                                     for i in range(0, 40, 3)],
        "many segments in one payload": [b"".join(counts.encode_rows(*sorted_part(c)) for c in chunks)],
        "unsorted segments": [counts.encode_rows(keys[c], hi[c], lo[c]) for c in chunks],
    }
    for name, payloads in cases.items():
        buf = counts.CountBuffer(compact_rows=compact_rows)
        for data in payloads:
            buf.add_payload(data)
        for g, w in zip(buf.result(), want):
            np.testing.assert_array_equal(g, w, err_msg=name)
    good = counts.encode_rows(*sorted_part(chunks[0]))
    damaged = good[:16] + good[16:-1] + bytes([good[-1] | 0x80])  # the last integer never ends
    buf = counts.CountBuffer()
    buf.add_payload(good)
    buf.add_payload(damaged)
    with pytest.raises(ValueError):
        buf.result()
