"""Local-mode training at growing corpus sizes: time per iteration, share outside the kernels, memory.

Every configuration runs in fresh processes (a Spark session of its own, ``local[CORES]``):

1. a child generates the corpus (``spark_align.corpus.synthetic.generate``, seed 0; source and
   target columns only) into the work directory, once per (pairs, vocabulary);
2. a child claims a run directory and ingests the corpus (as ``spark-align train`` does);
3. another child resumes it with ``engine.run.train(..., resume=True)``, so its Python workers
   run E-steps (and the final decoding) only, and prints one JSON line of figures, read back here.

Figures per configuration, over the iterations after the first ``--skip`` (2) of the first stage:
iteration 1 starts from the constant uniform table, which is never shipped per entry, and
iteration 2 searches every key in the table and stores the lookup hints that later iterations
start from (``engine.hints``); ``--skip 1`` includes it. Shares are of those iterations' total
core time:

* ``iter_s``: wall seconds per EM iteration (median), from the checkpoint manifests;
* ``searched``: the share of dictionary keys the lookup had to search for (no valid stored hint);
  ``trusted``: the share it took at their stored positions without reading any key (``engine.hints``);
* ``mlinks_core``: E-step kernel throughput, million links per second per core, = links /
  kernel seconds (a link is one (generated token, cond position incl. NULL) cell; both directions);
* ``outside``: the share of an iteration's core time spent outside the model kernels,
  ``1 - kernel_seconds / (iteration wall seconds x cores)``, kernel_seconds summed over both
  directions and all tasks (``metrics[dir].kernel_seconds`` of the manifest). It counts
  everything else: Arrow (de)serialisation, the table lookup, emitting and shuffling counts,
  the M-step, the checkpoint write, scheduling, and idle cores;
  It is split into shares of the same core time: the ``lookup`` (finding each block dictionary's
  entries in the table), ``accumulation`` (adding counts into the task's table-aligned
  accumulators), ``table load`` (each Python worker reading the table), ``block reads``,
  ``output records`` (grouping and compressing a task's counts for the shuffle), ``other E-step``
  (the rest of the E-step tasks' wall time: block views, the reverse grid, Python),
  ``reducers`` (summing, normalising and writing the table; with one E-step task, that task's
  own M-step after its E-step), ``join lookup tasks`` (the join path's
  tasks that read a table bucket and its routes and find each unit's entries; not handing them to
  Spark) and ``rest`` (Spark scheduling and shuffle, the join path's sort of routed entries, the driver,
  and idle cores; ``driver``: the part of it between the iteration's Spark jobs,
  when the driver plans and commits and the cores wait);
* ``outside_compute``: the same with the lookup and the accumulation counted as E-step
  computation: ``1 - (kernel + lookup + accumulation seconds) / (iteration seconds x cores)``;
* ``exponent``: the slope of log(iteration seconds) against log(pairs) over the sizes run;
* ``task_rss_mb``: peak resident memory of the Python workers, which run the E-step tasks and then
  the reducers (``ru_maxrss`` noted at the end of each E-step task and each reducer when
  ``SPARK_ALIGN_BENCH_TASK_MEMORY_DIR`` is set; max over them), and the same over the notes of E-step
  tasks (``estep_rss_mb``), of reducers (``reduce_rss_mb``) and of the join path's lookup tasks
  (``lookup_rss_mb``) apart. A reused Python worker's peak
  includes its earlier tasks', so ``--memory`` turns worker reuse off (a fresh worker per task) and
  the three are each kind's own peak;
* ``output_s``: seconds of the output pass (decoding every pair, joining to the corpus, writing;
  ``output.json``);
* ``driver_rss_mb``: peak resident memory of the driver's Python process (it plans the jobs and
  collects small sums; no path reads the table on the driver). In local mode the driver JVM is also the
  executor, so its heap is not a driver-only figure and is not reported.

Run: ``python3 benchmarks/bench_scaling.py --sizes 20000,100000,300000`` (issue-2 figures),
``--sizes 50000,200000,1000000`` (scaling), ``--memory`` (task memory against table size and
block size for both shipping paths). The machine's other load makes every figure noisy.
"""
from __future__ import annotations

import argparse
import json
import math
import os
import resource
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
# Parts of an E-step task's time recorded in the manifests (``engine.estep``, scalars 4-8).
PARTS = ("lookup", "accumulate", "table_load", "block_read", "payload")
sys.path.insert(0, str(HERE.parent))


def _child_generate(args) -> None:
    from spark_align.corpus import synthetic

    table = synthetic.generate(args.pairs, seed=0, src_vocab=args.vocab, tgt_vocab=args.vocab)
    synthetic.write_parquet(table.select(["id", "source", "target"]), args.corpus, n_files=4, overwrite=True)


def _child_ingest(args) -> None:
    """Claim the run directory and ingest, as ``train`` would; training then resumes in a fresh process,
    so the Python workers' peak memory is that of the E-step, not of ingestion."""
    import dataclasses

    from spark_align.config import CorpusConfig, RunConfig, parse_stages
    from spark_align.engine import ingest
    from spark_align.engine.session import get_session
    from spark_align.fingerprint import corpus_fingerprint
    from spark_align.store import FORMAT_VERSION, RunStore

    spark = get_session(f"local[{args.cores}]", {"spark.sql.shuffle.partitions": str(2 * args.cores),
                                                 "spark.driver.memory": "6g"})
    cfg = RunConfig(corpus=CorpusConfig(path=args.corpus), stages=parse_stages(args.stages),
                    block_size=args.block_size, shipping=args.shipping, prune_below=args.prune_below)
    store = RunStore(args.run)
    fingerprint = corpus_fingerprint(spark, cfg.corpus)
    store.write_json("run.json", {"format_version": FORMAT_VERSION, "config": cfg.to_dict(),
                                  "corpus_fingerprint": fingerprint})
    summary = dataclasses.asdict(ingest.ingest(spark, cfg, store))
    store.write_json("encoded.json", {**summary, "corpus_fingerprint": fingerprint})
    spark.stop()


def _child_train(args) -> None:
    from spark_align.config import CorpusConfig, RunConfig, parse_stages
    from spark_align.engine.estep import MEMORY_ENV
    from spark_align.engine.run import train
    from spark_align.engine.session import get_session
    from spark_align.store import RunStore

    os.environ[MEMORY_ENV] = args.memdir  # inherited by the Python workers
    spark = get_session(f"local[{args.cores}]", {"spark.sql.shuffle.partitions": str(2 * args.cores),
                                                 "spark.driver.memory": "6g", **json.loads(args.conf_json)})
    cfg = RunConfig(corpus=CorpusConfig(path=args.corpus), stages=parse_stages(args.stages),
                    block_size=args.block_size, shipping=args.shipping, prune_below=args.prune_below)
    started = time.time()
    train(spark, cfg, args.run, resume=True, log=lambda line: print(line, file=sys.stderr, flush=True))
    total = time.time() - started
    rows = []
    for ckpt in RunStore(args.run).checkpoints():
        m = ckpt.manifest
        dirs = m["directions"]
        rows.append({"stage": m["stage"], "iteration": m["iteration"], "seconds": m["seconds"],
                     "kernel_seconds": sum(m["metrics"][d]["kernel_seconds"] for d in dirs),
                     # the E-step tasks' wall time counts both directions once (it is folded per direction)
                     "estep_task_seconds": m["metrics"][dirs[0]].get("estep_task_seconds", 0.0),
                     **{f"{part}_seconds": m["metrics"][dirs[0]].get(f"{part}_seconds", 0.0) for part in PARTS},
                     "reduce_task_seconds": m["metrics"][dirs[0]].get("reduce_task_seconds", 0.0),
                     "route_lookup_seconds": m["metrics"][dirs[0]].get("route_lookup_seconds", 0.0),
                     "job_seconds": m["metrics"][dirs[0]].get("job_seconds", m["seconds"]),
                     **{key: sum(m["metrics"][d].get(key, 0.0) for d in dirs)
                        for key in ("lookup_keys_searched", "lookup_keys", "lookup_keys_trusted")},
                     "links": sum(m["metrics"][d]["links"] for d in dirs),
                     "shipping": m["metrics"][dirs[0]].get("shipping"),
                     "table_entries": m["metrics"][dirs[0]].get("table_entries"),
                     "loglik_per_word": m["metrics"][dirs[0]]["loglik_per_word"],
                     "pruned": {d: m["metrics"][d].get("pruned") for d in dirs}})
    task_kb = {name: int(Path(args.memdir, name).read_text()) for name in os.listdir(args.memdir)}
    reduce_kb = [kb for name, kb in task_kb.items() if name.startswith("reduce-")]
    lookup_kb = [kb for name, kb in task_kb.items() if name.startswith("lookup-")]
    estep_kb = [kb for name, kb in task_kb.items() if not name.startswith(("reduce-", "lookup-"))]
    output_s = RunStore(args.run).read_json("output.json")["seconds"]
    print(json.dumps({"iterations": rows, "total_s": total, "output_s": output_s,
                      "task_rss_mb": max(task_kb.values(), default=0) / 1024,
                      "estep_rss_mb": max(estep_kb, default=0) / 1024, "reduce_rss_mb": max(reduce_kb, default=0) / 1024,
                      "lookup_rss_mb": max(lookup_kb, default=0) / 1024,
                      "driver_rss_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024}))
    spark.stop()


def run_config(work: Path, pairs: int, *, vocab: int, shipping: str, block_size: int, stages: str,
               cores: int, prune_below: float | None = None, skip: int = 2, conf: dict | None = None) -> dict:
    corpus = work / f"corpus-{pairs}-{vocab}"
    if not (corpus / "_done").exists():
        subprocess.run([sys.executable, __file__, "_generate", "--pairs", str(pairs), "--vocab", str(vocab),
                        "--corpus", str(corpus)], check=True)
        (corpus / "_done").touch()
    run = Path(tempfile.mkdtemp(dir=work, prefix="run-"))
    os.rmdir(run)
    memdir = tempfile.mkdtemp(dir=work, prefix="mem-")
    cmd = [sys.executable, __file__, "_ingest", "--corpus", str(corpus), "--run", str(run), "--memdir", memdir,
           "--shipping", shipping, "--block-size", str(block_size), "--stages", stages, "--cores", str(cores),
           "--conf-json", json.dumps(conf or {})]
    if prune_below is not None:
        cmd += ["--prune-below", str(prune_below)]
    subprocess.run(cmd, check=True, stdout=subprocess.DEVNULL)
    cmd[2] = "_train"
    out = subprocess.run(cmd, check=True, stdout=subprocess.PIPE, text=True).stdout
    result = json.loads(out.strip().splitlines()[-1])
    first = stages.split(",")[0].split(":")[0]
    later = [r for r in result["iterations"] if not (r["stage"] == first and r["iteration"] <= skip)]
    result.update(pairs=pairs, vocab=vocab, shipping_mode=shipping, block_size=block_size, cores=cores,
                  conf=conf or {},
                  load_avg=os.getloadavg()[0])
    if later:
        # Seconds per iteration: the median; shares: of the same iterations' total core time, so that
        # the parts add up (medians of parts taken one by one do not).
        secs = statistics.median(r["seconds"] for r in later)
        kernel = sum(r["kernel_seconds"] for r in later) / len(later)
        links = sum(r["links"] for r in later) / len(later)
        task = sum(r["estep_task_seconds"] for r in later) / len(later)
        reduce = sum(r["reduce_task_seconds"] for r in later) / len(later)
        route = sum(r["route_lookup_seconds"] for r in later) / len(later)
        parts = {part: sum(r[f"{part}_seconds"] for r in later) / len(later) for part in PARTS}
        searched = sum(r.get("lookup_keys_searched", 0.0) for r in later)
        looked_up = sum(r.get("lookup_keys", 0.0) for r in later)
        trusted = sum(r.get("lookup_keys_trusted", 0.0) for r in later)
        core_s = sum(r["seconds"] for r in later) / len(later) * cores
        # the driver's own time between the Spark jobs of an iteration (planning, committing), cores idle
        between = sum(r["seconds"] - r.get("job_seconds", r["seconds"]) for r in later) / len(later) * cores
        compute = kernel + parts["lookup"] + parts["accumulate"]
        result.update(iter_s=secs, kernel_s=kernel, links=links, mlinks_core=links / kernel / 1e6,
                      outside=1.0 - kernel / core_s, outside_compute=1.0 - compute / core_s,
                      shipping=later[-1]["shipping"], table_entries=later[-1]["table_entries"],
                      lookup_vs_kernel=parts["lookup"] / kernel,
                      searched_share=searched / looked_up if looked_up else float("nan"),
                      trusted_share=trusted / looked_up if looked_up else float("nan"),
                      # where the core time went (shares of cores x iteration seconds)
                      **{f"{part}_share": v / core_s for part, v in parts.items()},
                      estep_other=(task - kernel - sum(parts.values())) / core_s if task else float("nan"),
                      reduce_share=reduce / core_s, route_lookup_share=route / core_s,
                      rest_share=1.0 - max(task, kernel) / core_s - reduce / core_s - route / core_s,
                      driver_share=between / core_s)
    subprocess.run(["rm", "-rf", str(run), memdir])
    return result


def fmt(r: dict) -> str:
    def pct(key: str) -> str:
        return f"{100 * r.get(key, float('nan')):4.1f}%"

    return (f"pairs {r['pairs']:>8d} vocab {r['vocab']:>6d} block {r['block_size']:>5d} {r.get('shipping', '?'):9s} "
            f"table {r.get('table_entries') or 0:>9d}  iter {r.get('iter_s', float('nan')):7.2f} s  "
            f"kernel {r.get('mlinks_core', float('nan')):6.1f} M links/s/core\n"
            f"    outside the kernels {pct('outside')}, outside kernels + lookup + accumulation {pct('outside_compute')}"
            f"  (lookup {pct('lookup_share')} with {pct('searched_share')} of keys searched and {pct('trusted_share')} at"
            f" stored positions, accumulation {pct('accumulate_share')}, table load"
            f" {pct('table_load_share')}, block reads {pct('block_read_share')}, output records {pct('payload_share')},"
            f" other E-step {pct('estep_other')}, reducers {pct('reduce_share')}, join lookup tasks"
            f" {pct('route_lookup_share')}, rest {pct('rest_share')}, of which"
            f" the driver between jobs {pct('driver_share')})\n"
            f"    task RSS {r['task_rss_mb']:6.0f} MB (noted by E-step tasks {r.get('estep_rss_mb', float('nan')):.0f}, "
            f"by reducers {r.get('reduce_rss_mb', float('nan')):.0f}, by the join's lookups "
            f"{r.get('lookup_rss_mb', float('nan')):.0f})  "
            f"driver RSS {r['driver_rss_mb']:5.0f} MB  output pass {r.get('output_s', float('nan')):.1f} s  "
            f"(load {r['load_avg']:.1f}, total {r['total_s']:.0f} s)")


def main() -> None:
    if len(sys.argv) > 1 and sys.argv[1] in ("_generate", "_ingest", "_train"):
        p = argparse.ArgumentParser()
        for name in ("--corpus", "--run", "--memdir", "--shipping", "--stages"):
            p.add_argument(name)
        for name in ("--pairs", "--vocab", "--block-size", "--cores"):
            p.add_argument(name, type=int)
        p.add_argument("--prune-below", type=float)
        p.add_argument("--conf-json", default="{}")
        args = p.parse_args(sys.argv[2:])
        {"_generate": _child_generate, "_ingest": _child_ingest, "_train": _child_train}[sys.argv[1]](args)
        return
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--sizes", default="20000,100000,300000", help="corpus sizes in pairs")
    parser.add_argument("--vocab", type=int, default=3000, help="words per side of the generated languages")
    parser.add_argument("--stages", default="ibm1:4")
    parser.add_argument("--skip", type=int, default=2,
                        help="iterations of the first stage left out of the figures: the first has the constant "
                             "table, the second searches every key and stores the lookup hints")
    parser.add_argument("--shipping", default="auto")
    parser.add_argument("--block-size", type=int, default=512)
    parser.add_argument("--cores", type=int, default=2)
    parser.add_argument("--memory", action="store_true",
                        help="instead: task memory vs table size (vocabulary) and block size, both shipping paths")
    parser.add_argument("--memory-pairs", type=int, default=100_000)
    parser.add_argument("--memory-configs", default="3000:512,100000:512,100000:4096",
                        help="VOCAB:BLOCK_SIZE list for --memory")
    parser.add_argument("--prune", type=float, default=None, help="instead: one size with and without pruning")
    parser.add_argument("--work", default=str(HERE / "_build" / "scaling"))
    parser.add_argument("--jsonl", default=None, help="also append every result to this file")
    parser.add_argument("--conf", action="append", default=[], metavar="KEY=VALUE",
                        help="a Spark setting for the training sessions, e.g. spark.spark_align.estepTasksPerCore=1")
    args = parser.parse_args()
    conf = dict(c.split("=", 1) for c in args.conf)
    work = Path(args.work)
    work.mkdir(parents=True, exist_ok=True)

    def record(r: dict) -> dict:
        print(fmt(r), flush=True)
        if args.jsonl:
            with open(args.jsonl, "a") as fh:
                fh.write(json.dumps(r) + "\n")
        return r

    if args.memory:
        # A fresh Python worker per task, so that each task's peak is its own: a reused worker's peak
        # includes what the tasks it ran before (E-step or reducer) took.
        conf.setdefault("spark.python.worker.reuse", "false")
        n = args.memory_pairs
        for vocab, block in (tuple(int(x) for x in c.split(":")) for c in args.memory_configs.split(",")):
            for shipping in ("broadcast", "join"):
                record(run_config(work, n, vocab=vocab, shipping=shipping, block_size=block, stages=args.stages,
                                  skip=args.skip, cores=args.cores, conf=conf))
        return
    if args.prune is not None:
        n = int(args.sizes.split(",")[0])
        for prune in (None, args.prune):
            r = record(run_config(work, n, vocab=args.vocab, shipping=args.shipping, block_size=args.block_size,
                                  stages=args.stages, skip=args.skip, cores=args.cores, prune_below=prune, conf=conf))
            last = r["iterations"][-1]
            print(f"  prune {prune}: final loglik/word {last['loglik_per_word']:.5f}; per iteration: "
                  + "; ".join(f"{x['iteration']}: {x['loglik_per_word']:.5f} pruned {x['pruned']}"
                              for x in r["iterations"]))
        return
    results = [record(run_config(work, int(n), vocab=args.vocab, shipping=args.shipping,
                                 block_size=args.block_size, stages=args.stages, skip=args.skip, cores=args.cores,
                                 conf=conf))
               for n in args.sizes.split(",")]
    xs = [math.log(r["pairs"]) for r in results]
    ys = [math.log(r["iter_s"]) for r in results]
    if len(xs) > 1:
        mx, my = statistics.fmean(xs), statistics.fmean(ys)
        slope = sum((x - mx) * (y - my) for x, y in zip(xs, ys)) / sum((x - mx) ** 2 for x in xs)
        print(f"growth exponent of iteration time vs pairs (log-log least squares): {slope:.2f}")


if __name__ == "__main__":
    main()
