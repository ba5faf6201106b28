"""A tiny in-process EM driver over one block, for tests.

It does what the engine does, without Spark: one E-step per iteration through
the model interface, then the lexical M-step
t_new(entry) = max(count(entry) / sum of counts with the same cond word, 1e-12)
(cond word = key >> 32 forward, key & 0xffffffff reverse), then
``model.m_step_dense``. The uniform start is 1 / (number of distinct gen words,
NULL excluded), the convention of NLTK's IBM models (its ``trg_vocab`` never
holds None).
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from spark_align.kernels import ragged

MIN_PROB = 1e-12


def make_block(pairs: list[tuple[list[int], list[int]]]) -> ragged.Block:
    """Block from (src word ids, tgt word ids) pairs; ids are >= 1 (0 is NULL)."""
    src = [np.asarray(s, dtype=np.int32) for s, _ in pairs]
    tgt = [np.asarray(g, dtype=np.int32) for _, g in pairs]
    return ragged.build_block(
        ragged.offsets_from_lengths(np.array([len(s) for s in src])),
        np.concatenate(src) if src else np.zeros(0, np.int32),
        ragged.offsets_from_lengths(np.array([len(g) for g in tgt])),
        np.concatenate(tgt) if tgt else np.zeros(0, np.int32))


def cond_gen_words(block: ragged.Block, direction: str) -> tuple[np.ndarray, np.ndarray]:
    """(cond word, gen word) of every dictionary entry, int64 (n_dict,) each."""
    src, tgt = ragged.split_key(block.dict_keys)
    return (src.astype(np.int64), tgt.astype(np.int64)) if direction == "forward" else (
        tgt.astype(np.int64), src.astype(np.int64))


def uniform_t(block: ragged.Block, direction: str) -> np.ndarray:
    """t = 1 / |gen vocabulary| for every dictionary entry."""
    view = block.view(direction)
    n_gen_words = len(np.unique(view.gen_ids))
    return np.full(len(block.dict_keys), 1.0 / n_gen_words)


def normalize_lexical(block: ragged.Block, direction: str, counts: np.ndarray) -> np.ndarray:
    """Lexical M-step with the 1e-12 floor; float64 (n_dict,)."""
    cond, _ = cond_gen_words(block, direction)
    _, group = np.unique(cond, return_inverse=True)
    totals = np.bincount(group, weights=counts)[group]
    est = np.divide(counts, totals, out=np.zeros_like(counts), where=totals > 0)
    return np.maximum(est, MIN_PROB)


@dataclass
class EMRun:
    t: np.ndarray
    dense: dict
    logliks: list[float] = field(default_factory=list)


def run_em(model, block: ragged.Block, n_iter: int, *, direction: str = "forward",
           t: np.ndarray | None = None, dense: dict | None = None, previous: dict | None = None,
           no_null: bool = False) -> EMRun:
    """Run ``n_iter`` EM iterations; ``logliks[k]`` is the log-likelihood under the k-th parameters.

    ``no_null`` keeps t(. | NULL) at 0, for worked examples that have no NULL word.
    """
    view = block.view(direction)
    cond, _ = cond_gen_words(block, direction)
    t = uniform_t(block, direction) if t is None else t.copy()
    if no_null:
        t[cond == 0] = 0.0
    dense = model.init_dense(previous) if dense is None else dense
    run = EMRun(t, dense)
    for _ in range(n_iter):
        counts, stats, loglik = model.e_step(view, run.t, run.dense)
        run.logliks.append(loglik)
        run.t = normalize_lexical(block, direction, counts)
        if no_null:
            run.t[cond == 0] = 0.0
        run.dense = model.m_step_dense(stats, run.dense)
    return run


def random_corpus(rng: np.random.Generator, n_pairs: int, *, max_len: int = 6, n_src_words: int = 8,
                  n_tgt_words: int = 8, min_len: int = 1) -> list[tuple[list[int], list[int]]]:
    """Random pairs of word ids 1..n_words, lengths min_len..max_len."""
    out = []
    for _ in range(n_pairs):
        ls, lt = rng.integers(min_len, max_len + 1, size=2)
        out.append((list(rng.integers(1, n_src_words + 1, size=ls)), list(rng.integers(1, n_tgt_words + 1, size=lt))))
    return out
