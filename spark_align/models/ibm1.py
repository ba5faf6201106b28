"""IBM Model 1 bound to the model interface: no dense parameters."""
from __future__ import annotations

from typing import ClassVar

import numpy as np

from spark_align.kernels import ibm1
from spark_align.kernels.ragged import View
from spark_align.models.base import Dense


class IBM1:
    """IBM Model 1: lexical table only, uniform alignment probability 1/(l+1)."""

    name: ClassVar[str] = "ibm1"
    kernel_version: ClassVar[str] = "1"

    def __init__(self, **options: object) -> None:
        if options:
            raise ValueError(f"ibm1 takes no options, got {sorted(options)}")

    def dense_size(self) -> int:
        return 0

    def init_dense(self, previous: Dense | None) -> Dense:
        return {}

    def e_step(self, view: View, t: np.ndarray, dense: Dense) -> tuple[np.ndarray, np.ndarray, float]:
        counts, loglik = ibm1.e_step(view, t)
        return counts, np.zeros(0), loglik

    def m_step_dense(self, stats: np.ndarray, dense: Dense) -> Dense:
        return {}

    def decode(self, view: View, t: np.ndarray, dense: Dense, *, method: str,
               threshold: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        gc, post = ibm1.posteriors(view, t)
        return select_links(gc.token, gc.cond_pos, post, ibm1.argmax_per_token(gc, post),
                            method=method, threshold=threshold)

    def pair_loglik(self, view: View, t: np.ndarray, dense: Dense) -> np.ndarray:
        return ibm1.pair_loglik(view, t)


def select_links(token: np.ndarray, cond_pos: np.ndarray, post: np.ndarray, best_pos: np.ndarray,
                 *, method: str, threshold: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Pick links from token-major link posteriors (shared by models whose links are listed per token).

    ``best_pos`` is the Viterbi position per token (0 = NULL). Returns
    (token, cond_pos, posterior) of the chosen non-NULL links.
    """
    if method == "viterbi":
        keep = (cond_pos == best_pos[token]) & (cond_pos > 0)
    elif method == "posterior":
        keep = (post >= threshold) & (cond_pos > 0)
    else:
        raise ValueError(f"decoding method must be 'viterbi' or 'posterior', not {method!r}")
    return token[keep], cond_pos[keep], post[keep]
