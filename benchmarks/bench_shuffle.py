"""What moving an E-step's count payloads through Spark's shuffle costs, with no counting at all.

Each of ``--tasks`` map tasks makes ``--mb-per-task`` MB of incompressible bytes (random, as the
count payloads are: lz4 leaves them as they are) split into one record per reducer bucket, and
``--reducers`` reducer tasks receive them the way an EM iteration's records travel
(``RDD.partitionBy`` with the bucket as partition, then ``mapPartitionsWithIndex``; see
``engine.mstep``) and only count their bytes. A second job makes the same bytes and drops them in
the map tasks. The difference between the two jobs' wall times is what the shuffle costs: pickling
in the Python workers, the JVM's shuffle write and read, and the bytes back into Python.

The defaults are one Model 1 iteration at 1M pairs on ``local[2]`` (bench_scaling.py: 4 E-step
tasks of about 77 MB each, 4 reducers); ``--iteration-seconds`` prints the cost as a share of
that iteration's core time.

    python3 benchmarks/bench_shuffle.py [--tasks 4] [--reducers 4] [--mb-per-task 77] [--cores 2]
        [--repeat 3] [--iteration-seconds 8.9] [--conf KEY=VALUE]
"""
from __future__ import annotations

import argparse
import statistics
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))


def make_records(n_buckets: int, n_bytes: int):
    """mapPartitionsWithIndex function: (bucket, random bytes) records, ``n_bytes`` in all."""

    def make(index, _items):
        import numpy as np

        rng = np.random.default_rng(index)
        for bucket in range(n_buckets):
            yield bucket, rng.bytes(n_bytes // n_buckets)

    return make


def drain(index, records):
    started = time.perf_counter()
    n = 0
    for _bucket, data in records:
        n += len(data)
    yield index, n, time.perf_counter() - started


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--tasks", type=int, default=4)
    parser.add_argument("--reducers", type=int, default=4)
    parser.add_argument("--mb-per-task", type=float, default=77.0)
    parser.add_argument("--cores", type=int, default=2)
    parser.add_argument("--repeat", type=int, default=3)
    parser.add_argument("--iteration-seconds", type=float, default=None,
                        help="an iteration's wall seconds, to print the cost as a share of its core time")
    parser.add_argument("--conf", action="append", default=[], metavar="KEY=VALUE",
                        help="a Spark setting for the session (repeatable)")
    args = parser.parse_args()

    from spark_align.engine.session import get_session

    spark = get_session(f"local[{args.cores}]", {"spark.ui.enabled": "false",
                                                  **dict(kv.split("=", 1) for kv in args.conf)})
    spark.sparkContext.setLogLevel("ERROR")
    sc = spark.sparkContext
    n_bytes = int(args.mb_per_task * 2 ** 20)
    make = make_records(args.reducers, n_bytes)
    n_reducers = args.reducers

    def shuffled():
        return (sc.parallelize(range(args.tasks), args.tasks).mapPartitionsWithIndex(make)
                .partitionBy(n_reducers, lambda bucket: bucket).mapPartitionsWithIndex(drain).collect())

    def dropped():
        return sc.parallelize(range(args.tasks), args.tasks).mapPartitionsWithIndex(make).map(
            lambda r: len(r[1])).sum()

    shuffled()  # warm-up: the Python workers, the JVM's code paths
    dropped()
    walls, drains, bases = [], [], []
    for _ in range(args.repeat):
        started = time.perf_counter()
        out = shuffled()
        walls.append(time.perf_counter() - started)
        if sum(n for _i, n, _s in out) != args.tasks * (n_bytes // n_reducers) * n_reducers:
            raise SystemExit("bytes lost in the shuffle")
        drains.append(sum(s for _i, _n, s in out))
        started = time.perf_counter()
        dropped()
        bases.append(time.perf_counter() - started)
    wall, base = statistics.median(walls), statistics.median(bases)
    cost = (wall - base) * args.cores
    total_mb = args.tasks * n_bytes / 2 ** 20
    print(f"{args.tasks} tasks x {args.mb_per_task:g} MB -> {args.reducers} reducers ({total_mb:.0f} MB), "
          f"local[{args.cores}], median of {args.repeat}:")
    print(f"  with the shuffle {wall:.2f} s, bytes made and dropped {base:.2f} s: the shuffle costs "
          f"{wall - base:.2f} s wall, {cost:.2f} core-seconds ({1e3 * cost / total_mb:.1f} core-ms per MB); "
          f"reducers receiving {statistics.median(drains):.2f} core-seconds of it")
    if args.iteration_seconds:
        print(f"  = {100 * cost / (args.iteration_seconds * args.cores):.1f}% of an iteration of "
              f"{args.iteration_seconds:g} s on {args.cores} cores")
    spark.stop()


if __name__ == "__main__":
    main()
