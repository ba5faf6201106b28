"""Throughput of the E-step kernels on a generated corpus (no Spark).

Corpus: ``--pairs`` sentence pairs, each side 10-40 tokens (uniform), words
drawn from a Zipf(1.1) distribution over ``--vocab`` words per side, encoded
into one block. Lexical probabilities are random. Figures printed:

* IBM1 / IBM2 / diagonal IBM2 E-step: million links per second, a link being one
  (generated token, cond position 0..l) pair;
* HMM E-step (forward-backward + counts): million cells per second, a cell
  being one (target position, previous source position, source position)
  transition, i.e. m * l * l per pair;
* the table lookup that precedes every E-step (``--lookup``, on by default): finding the
  block's dictionary keys in a whole table of ``--table-blocks`` such blocks' dictionaries
  (the realistic table: every co-occurring pair of a corpus that many times larger), by
  ``np.searchsorted``, by our galloping search (``kernels.lookup``) and from stored hints (the
  insertion points of an earlier search, checked and used; also the cost of encoding and decoding
  them), in ns per key and as a ratio to the Model 1 E-step of the same block.

Run: ``python3 benchmarks/bench_kernels.py [--pairs 4000] [--repeat 3]``.
"""
from __future__ import annotations

import argparse
import time

import numpy as np

from spark_align.kernels import ragged
from spark_align.models.hmm import HMM
from spark_align.models.ibm1 import IBM1
from spark_align.models.ibm2 import IBM2, IBM2Diag


def zipf_corpus(rng: np.random.Generator, n_pairs: int, n_words: int, min_len: int = 10,
                max_len: int = 40) -> ragged.Block:
    weights = 1.0 / np.arange(1, n_words + 1) ** 1.1
    weights /= weights.sum()
    src_len = rng.integers(min_len, max_len + 1, n_pairs)
    tgt_len = rng.integers(min_len, max_len + 1, n_pairs)
    src_ids = rng.choice(n_words, size=int(src_len.sum()), p=weights).astype(np.int32) + 1
    tgt_ids = rng.choice(n_words, size=int(tgt_len.sum()), p=weights).astype(np.int32) + 1
    return ragged.build_block(ragged.offsets_from_lengths(src_len), src_ids,
                              ragged.offsets_from_lengths(tgt_len), tgt_ids)


def best_time(fn, repeat: int) -> float:
    times = []
    for _ in range(repeat):
        start = time.perf_counter()
        fn()
        times.append(time.perf_counter() - start)
    return min(times)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--pairs", type=int, default=4000)
    parser.add_argument("--vocab", type=int, default=20_000)
    parser.add_argument("--repeat", type=int, default=3)
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--table-blocks", type=int, default=25,
                        help="the lookup's table is the union of this many blocks' dictionaries")
    args = parser.parse_args()

    rng = np.random.default_rng(args.seed)
    start = time.perf_counter()
    block = zipf_corpus(rng, args.pairs, args.vocab)
    build = time.perf_counter() - start
    view = block.view("forward")
    t = rng.uniform(1e-4, 1.0, len(block.dict_keys))
    l, m = view.cond_len, view.gen_len
    n_links = int(((l + 1) * m).sum())
    n_cells = int((m * l * l).sum())
    print(f"corpus: {args.pairs} pairs, {int(m.sum())} target tokens, {len(block.dict_keys)} dictionary "
          f"entries, {n_links} links, {n_cells} HMM cells; block built in {build:.2f} s")

    ibm1_secs = None
    for model in (IBM1(), IBM2(), IBM2Diag()):
        dense = model.init_dense(None)
        model.e_step(view, t, dense)  # compile / load the compiled kernel outside the timing
        secs = best_time(lambda: model.e_step(view, t, dense), args.repeat)
        ibm1_secs = ibm1_secs or secs
        print(f"{model.name:9s} e_step: {secs:7.3f} s  {n_links / secs / 1e6:8.2f} M links/s")
    if args.table_blocks > 0:
        from spark_align.kernels import lookup

        others = [zipf_corpus(rng, args.pairs, args.vocab).dict_keys for _ in range(args.table_blocks - 1)]
        table = np.unique(np.concatenate([block.dict_keys, *others]))
        probs = rng.random(len(table))
        keys = block.dict_keys
        lookup.find(table, probs, keys[:10], 1e-12)  # compile outside the timing

        def searchsorted():
            pos = np.minimum(np.searchsorted(table, keys), len(table) - 1)
            return np.where(table[pos] == keys, probs[pos], 1e-12)

        hints = lookup.find_hinted(table, probs, keys, 1e-12, None)[3]
        lookup.find_hinted(table, probs, keys[:10], 1e-12, hints[:10])
        index = lookup.key_index(table)
        lookup.find_hinted(table, probs, keys[:10], 1e-12, None, index)
        for name, fn in (("searchsorted", searchsorted),
                         ("galloping", lambda: lookup.find(table, probs, keys, 1e-12)),
                         ("hash index", lambda: lookup.find_hinted(table, probs, keys, 1e-12, None, index)),
                         ("hinted", lambda: lookup.find_hinted(table, probs, keys, 1e-12, hints)),
                         ("hints decoded", lambda: lookup.decode_hints(lookup.encode_hints(lookup.StoredHints(hints))))):
            secs = best_time(fn, args.repeat)
            print(f"lookup {name:12s}: {secs:7.3f} s  {secs / len(keys) * 1e9:6.1f} ns/key  "
                  f"{len(keys)} keys in a {len(table)}-entry table  = {secs / ibm1_secs:.2f} x the ibm1 e_step")
        secs = best_time(lambda: lookup.key_index(table), args.repeat)
        print(f"lookup index build  : {secs:7.3f} s  {secs / len(table) * 1e9:6.1f} ns/table entry (once per table"
              f" and Python worker, when keys are searched for)")
        # Adding the block's counts into the table-aligned accumulators (engine.mstep.TaskCounts).
        from spark_align.kernels import counts

        pos, hit, _ = lookup.find(table, probs, keys, 1e-12)
        acc, touched = np.zeros((len(table), 2), np.int64), np.zeros(len(table), bool)
        emitted, values = np.ones(len(keys), bool), rng.random(len(keys))
        counts.add_at_positions(pos, hit, emitted, values, acc, touched, hi_scale=2.0 ** 20, lo_scale=2.0 ** 30)
        secs = best_time(lambda: counts.add_at_positions(pos, hit, emitted, values, acc, touched,
                                                         hi_scale=2.0 ** 20, lo_scale=2.0 ** 30), args.repeat)
        print(f"count accumulation  : {secs:7.3f} s  {secs / len(keys) * 1e9:6.1f} ns/key  "
              f"= {secs / ibm1_secs:.2f} x the ibm1 e_step")
    model = HMM()
    dense = model.init_dense(None)
    secs = best_time(lambda: model.e_step(view, t, dense), args.repeat)
    print(f"{'hmm':9s} e_step: {secs:7.3f} s  {n_cells / secs / 1e6:8.2f} M cells/s "
          f"({n_links / secs / 1e6:.2f} M links/s)")
    secs = best_time(lambda: model.decode(view, t, dense, method="viterbi", threshold=0.0), args.repeat)
    print(f"{'hmm':9s} viterbi decode (incl. posteriors): {secs:7.3f} s  {n_cells / secs / 1e6:8.2f} M cells/s")


if __name__ == "__main__":
    main()
