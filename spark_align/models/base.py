"""The model interface the EM engine drives.

The engine (``spark_align.engine``) owns the loop, the lexical table and Spark;
a model owns only its maths, through pure kernels:

* the lexical table t(gen word | cond word) is shared by all models: the engine
  looks it up per block dictionary entry and passes it in as ``t`` (float64,
  one value per dictionary entry); the model returns expected ``counts`` per
  entry, and the engine sums and normalises them in Spark;
* a model may have small *dense* parameters (alignment or jump tables, a
  tension): ``init_dense`` makes them, ``e_step`` returns their sufficient
  statistics as one float64 vector of length ``dense_size()`` (summed exactly
  across blocks by the engine), and ``m_step_dense`` turns the summed vector
  into new dense parameters on the driver. Dense parameters are a
  ``dict[str, numpy array]`` small enough to live in a JSON manifest.
"""
from __future__ import annotations

from typing import ClassVar, Protocol

import numpy as np

from spark_align.kernels.ragged import GenCells, View, links_at_least

Dense = dict[str, np.ndarray]


class AlignmentModel(Protocol):
    """What a model kind provides. Options come from the stage configuration."""

    name: ClassVar[str]
    kernel_version: ClassVar[str]

    def dense_size(self) -> int:
        """Length of the dense statistics vector returned by :meth:`e_step`."""

    def init_dense(self, previous: Dense | None) -> Dense:
        """Initial dense parameters; ``previous`` is the last stage's (may be another model's)."""

    def e_step(self, view: View, t: np.ndarray, dense: Dense) -> tuple[np.ndarray, np.ndarray, float]:
        """(lexical counts float64 (len(t),), dense stats float64 (dense_size(),), log-likelihood)."""

    def m_step_dense(self, stats: np.ndarray, dense: Dense) -> Dense:
        """New dense parameters from the dense statistics summed over the corpus."""

    def decode(self, view: View, t: np.ndarray, dense: Dense, *, method: str,
               threshold: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Chosen links: (gen token index int64, cond position int64 >= 1, posterior float64).

        ``method`` is 'viterbi' (one link or NULL per generated token; NULL links are
        dropped) or 'posterior' (every link whose posterior >= threshold). Token
        indices count generated tokens of the view in pair order from 0; cond
        positions count from 1 (0 would be NULL and is never returned).
        """

    def pair_loglik(self, view: View, t: np.ndarray, dense: Dense) -> np.ndarray:
        """log p(gen sentence | cond sentence) per pair, float64 (n_pairs,)."""

    def decode_pass(self, view: View, t: np.ndarray, dense: Dense, *, method: str
                    ) -> tuple[GenCells, np.ndarray, np.ndarray, np.ndarray | None]:
        """What :meth:`decode` and :func:`decode_all` choose links from, computed once:
        (links ``gc``, posterior per link, best cond position per token under ``method``, and the
        per-pair log-likelihood when the pass yields it for free, else None)."""


def select_links(gc: GenCells, post: np.ndarray, best_pos: np.ndarray,
                 *, method: str, threshold: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Pick links from token-major link posteriors (``post``: one per link of ``gc``), shared by every
    model: each lists its links per token.

    ``best_pos`` is the Viterbi position per token (0 = NULL). Returns
    (token, cond_pos, posterior) of the chosen non-NULL links.
    """
    if method == "viterbi":
        keep = (gc.cond_pos == best_pos[gc.token]) & (gc.cond_pos > 0)
    elif method == "posterior":
        return links_at_least(gc, post, threshold)
    else:
        raise ValueError(f"decoding method must be 'viterbi' or 'posterior', not {method!r}")
    return gc.token[keep], gc.cond_pos[keep], post[keep]


def viterbi_links(gc: GenCells, post: np.ndarray, best_pos: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """``select_links(..., method="viterbi")`` in time per token, not per link: token ``k``'s link at
    position ``i`` is number ``gc.token_starts[k] + i`` (a sixth of decoding a block's pairs went to
    the per-link selection)."""
    token = np.flatnonzero(best_pos > 0)
    cond = np.asarray(best_pos, np.int64)[token]
    return token, cond, post[gc.token_starts[token] + cond]


def _chosen(gc: GenCells, post, best, *, method: str, threshold: float):
    if method == "viterbi":
        return viterbi_links(gc, post, best)
    return select_links(gc, post, best, method=method, threshold=threshold)


def decode(model, view: View, t: np.ndarray, dense: Dense, *, method: str, threshold: float):
    """:meth:`AlignmentModel.decode` for a model that implements :meth:`~AlignmentModel.decode_pass`."""
    gc, post, best, _ = model.decode_pass(view, t, dense, method=method)
    return _chosen(gc, post, best, method=method, threshold=threshold)


def decode_all(model, view: View, t: np.ndarray, dense: Dense, *, method: str, threshold: float,
               every_threshold: float | None):
    """Everything the output needs from one view, from one pass of the model:
    (chosen links as :meth:`~AlignmentModel.decode` returns them, every link whose posterior reaches
    ``every_threshold`` (None: not wanted), per-pair log-likelihood).

    Decoding, posterior listing and scoring separately ran the model three times per view (three
    forward-backward passes for the HMM)."""
    gc, post, best, loglik = model.decode_pass(view, t, dense, method=method)
    chosen = _chosen(gc, post, best, method=method, threshold=threshold)
    every = None if every_threshold is None else links_at_least(gc, post, every_threshold)
    return chosen, every, (model.pair_loglik(view, t, dense) if loglik is None else loglik)
