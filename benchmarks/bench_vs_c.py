"""Our E-step kernels against a C reference on the same arrays, in the same run.

The C reference (``benchmarks/c/estep_ref.c``) is compiled here with the
system C compiler at ``-O2`` (no other optimisation flag) into
``benchmarks/_build/`` and called through ctypes on the very arrays our
kernels get (a view's cell grid and the block-local probabilities ``t``).
Before timing, the two are checked to agree (counts and log-likelihood to
1e-9 relative), so the ratio compares equal work.

Figures (one core each; the machine is shared, so they are noisy; best of
``--repeat``, ours and C interleaved):

* Model 1 E-step (numba-compiled): million links/s (a link = one (generated token, cond
  position 0..l) cell), ours and C's, and ours / C;
* HMM E-step (forward-backward, lexical and jump counts): million links/s and
  million transition cells/s (m * l * l per pair), ours and C's, and the ratio.

Corpus: the generated corpus of ``spark_align.corpus.synthetic`` (``--pairs``
pairs) encoded into blocks of ``--block-size`` pairs, as the Spark job does;
``t`` is random.

Run: ``python3 benchmarks/bench_vs_c.py [--pairs 20000] [--repeat 3]``.
"""
from __future__ import annotations

import argparse
import ctypes
import os
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))

from spark_align.kernels import hmm as hmm_kernels  # noqa: E402
from spark_align.kernels import ragged  # noqa: E402
from spark_align.models.hmm import HMM  # noqa: E402
from spark_align.models.ibm1 import IBM1  # noqa: E402

SOURCE = HERE / "c" / "estep_ref.c"
BUILD = HERE / "_build"


def build_reference() -> ctypes.CDLL:
    """Compile the C reference at -O2 and load it."""
    BUILD.mkdir(exist_ok=True)
    lib = BUILD / "libestep_ref.so"
    cc = os.environ.get("CC", "cc")
    subprocess.run([cc, "-O2", "-shared", "-fPIC", "-o", str(lib), str(SOURCE), "-lm"], check=True)
    dll = ctypes.CDLL(str(lib))
    p = ctypes.c_void_p
    dll.ibm1_estep.restype = ctypes.c_double
    dll.ibm1_estep.argtypes = [ctypes.c_int64, p, p, p, p, p, p]
    dll.hmm_estep.restype = ctypes.c_double
    dll.hmm_estep.argtypes = [ctypes.c_int64, p, p, p, p, p, p, p, ctypes.c_double, ctypes.c_int64,
                              ctypes.c_int64, p]
    return dll


def _ptr(a: np.ndarray):
    return a.ctypes.data_as(ctypes.c_void_p)


def c_ibm1(dll, view: ragged.View, t: np.ndarray) -> tuple[np.ndarray, float]:
    counts = np.zeros(len(t))
    ll = dll.ibm1_estep(view.n_pairs, _ptr(view.cond_len), _ptr(view.gen_len), _ptr(view.cell_offsets),
                        _ptr(view.cells), _ptr(t), _ptr(counts))
    return counts, ll


def c_hmm(dll, view: ragged.View, t: np.ndarray, jump: np.ndarray, p_null: float, max_jump: int):
    counts = np.zeros(len(t))
    stats = np.zeros(hmm_kernels.stats_size(max_jump))
    ll = dll.hmm_estep(view.n_pairs, _ptr(view.cond_len), _ptr(view.gen_len), _ptr(view.cell_offsets),
                       _ptr(view.cells), _ptr(t), _ptr(counts), _ptr(jump), p_null, max_jump,
                       hmm_kernels.CONTEXT_CAP, _ptr(stats))
    return counts, stats, ll


def contiguous_view(view: ragged.View) -> ragged.View:
    """The same view with every array contiguous and of the dtype the C code expects."""
    return ragged.View(*(np.ascontiguousarray(getattr(view, f), dtype=np.int32 if f == "cells" else np.int64)
                         if f in ("cond_len", "gen_len", "cell_offsets", "cells") else getattr(view, f)
                         for f in ("cond_len", "gen_len", "cell_offsets", "cells", "cond_offsets", "cond_ids",
                                   "gen_offsets", "gen_ids")))  # cells as the grid: not gen_major


def generated_blocks(n_pairs: int, block_size: int, seed: int) -> list[ragged.Block]:
    from spark_align.corpus import synthetic

    corpus = synthetic.generate(n_pairs, seed=seed)
    src_words, tgt_words = corpus.column("source").to_pylist(), corpus.column("target").to_pylist()
    vocab: dict[str, int] = {}
    tvocab: dict[str, int] = {}
    blocks = []
    for start in range(0, n_pairs, block_size):
        s_tok = [s.split() for s in src_words[start:start + block_size]]
        t_tok = [s.split() for s in tgt_words[start:start + block_size]]
        s_ids = np.array([vocab.setdefault(w, len(vocab) + 1) for sent in s_tok for w in sent], np.int32)
        t_ids = np.array([tvocab.setdefault(w, len(tvocab) + 1) for sent in t_tok for w in sent], np.int32)
        blocks.append(ragged.build_block(ragged.offsets_from_lengths(np.array([len(s) for s in s_tok])), s_ids,
                                         ragged.offsets_from_lengths(np.array([len(s) for s in t_tok])), t_ids))
    return blocks


def best_time(fn, repeat: int) -> float:
    times = []
    for _ in range(repeat):
        start = time.perf_counter()
        fn()
        times.append(time.perf_counter() - start)
    return min(times)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--pairs", type=int, default=20_000)
    parser.add_argument("--block-size", type=int, default=512)
    parser.add_argument("--repeat", type=int, default=3)
    parser.add_argument("--seed", type=int, default=0)
    args = parser.parse_args()

    dll = build_reference()
    rng = np.random.default_rng(args.seed)
    blocks = generated_blocks(args.pairs, args.block_size, args.seed)
    work = []
    for block in blocks:
        view = contiguous_view(block.view("forward"))
        work.append((view, rng.uniform(1e-3, 1.0, len(block.dict_keys))))
    n_links = sum(int(((v.cond_len + 1) * v.gen_len).sum()) for v, _ in work)
    n_cells = sum(int((v.gen_len * v.cond_len ** 2).sum()) for v, _ in work)
    print(f"corpus: {args.pairs} generated pairs in {len(work)} blocks, {n_links} links, {n_cells} HMM cells")

    # Agreement first: the ratio is only meaningful for equal results.
    ibm1, model_hmm = IBM1(), HMM()
    dense = model_hmm.init_dense(None)
    jump = np.ascontiguousarray(rng.uniform(0.5, 1.5, len(dense["jump"])))
    jump /= jump.sum()
    dense = {"jump": jump}
    for view, t in work[:3]:
        ours, _, ll = ibm1.e_step(view, t, {})
        ref, ll_ref = c_ibm1(dll, view, t)
        assert np.allclose(ours, ref, rtol=1e-9, atol=1e-12) and abs(ll - ll_ref) <= 1e-9 * abs(ll_ref), "ibm1"
        ours, stats, ll = model_hmm.e_step(view, t, dense)
        ref, stats_ref, ll_ref = c_hmm(dll, view, t, jump, model_hmm.p_null, model_hmm.max_jump)
        assert np.allclose(ours, ref, rtol=1e-9, atol=1e-12), "hmm counts"
        assert np.allclose(stats, stats_ref, rtol=1e-9, atol=1e-9), "hmm stats"
        assert abs(ll - ll_ref) <= 1e-9 * abs(ll_ref), "hmm loglik"
    print("agreement: ours == C reference (counts, jump stats, log-likelihood; rtol 1e-9)")

    rows = []
    for name, ours_fn, c_fn, unit, n_unit in (
            ("ibm1", lambda: [ibm1.e_step(v, t, {}) for v, t in work],
             lambda: [c_ibm1(dll, v, t) for v, t in work], "links", n_links),
            ("hmm", lambda: [model_hmm.e_step(v, t, dense) for v, t in work],
             lambda: [c_hmm(dll, v, t, jump, model_hmm.p_null, model_hmm.max_jump) for v, t in work],
             "links", n_links)):
        first = time.perf_counter()
        ours_fn()
        first = time.perf_counter() - first
        # Interleaved, best of each: other load on the machine hits both alike.
        pairs_of_times = [(best_time(ours_fn, 1), best_time(c_fn, 1)) for _ in range(args.repeat)]
        ours, ref = min(p[0] for p in pairs_of_times), min(p[1] for p in pairs_of_times)
        rows.append((name, ours, ref, first))
        extra = (f"; {n_cells / ours / 1e6:.1f} vs {n_cells / ref / 1e6:.1f} M cells/s" if name == "hmm" else "")
        print(f"{name:5s} ours {ours:7.3f} s ({n_unit / ours / 1e6:7.2f} M {unit}/s)  "
              f"C -O2 {ref:7.3f} s ({n_unit / ref / 1e6:7.2f} M {unit}/s)  ratio ours/C {ref / ours:5.2f}"
              f"{extra}  (first call {first:.3f} s)")


if __name__ == "__main__":
    main()
