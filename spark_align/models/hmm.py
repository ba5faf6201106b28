"""HMM alignment model bound to the model interface (maths in :mod:`spark_align.kernels.hmm`)."""
from __future__ import annotations

from typing import ClassVar

import numpy as np

from spark_align.kernels import hmm
from spark_align.kernels.ragged import View
from spark_align.models import base
from spark_align.models.base import Dense
from spark_align.models.ibm2 import check_int, check_options, check_real


class HMM:
    """First-order HMM over cond positions with NULL states, jump-width parameters c(d).

    Options: ``p_null`` (default 0.2, fixed: a common setting, no source, value
    from memory), ``max_jump`` (default 7: jumps beyond +-7 share the edge
    buckets). Dense parameters: ``{"jump": float64 (2*max_jump+1,)}``, the
    weights c(-K..K) (summing to 1). A first HMM stage starts from uniform
    jump weights, i.e. uniform transitions.
    """

    name: ClassVar[str] = "hmm"
    kernel_version: ClassVar[str] = "1"

    def __init__(self, **options: object) -> None:
        opts = check_options(self.name, options, {"p_null": 0.2, "max_jump": 7})
        self.p_null = check_real(self.name, "p_null", opts["p_null"], 0.0, 1.0, open_low=True, open_high=True)
        self.max_jump = check_int(self.name, "max_jump", opts["max_jump"], 1, 100)

    def dense_size(self) -> int:
        return hmm.stats_size(self.max_jump)

    def init_dense(self, previous: Dense | None) -> Dense:
        prev = (previous or {}).get("jump")
        nb = hmm.n_buckets(self.max_jump)
        if prev is not None and len(prev) == nb:
            return {"jump": np.array(prev, dtype=np.float64)}
        return {"jump": np.full(nb, 1.0 / nb)}

    def e_step(self, view: View, t: np.ndarray, dense: Dense) -> tuple[np.ndarray, np.ndarray, float]:
        return hmm.e_step(view, t, dense["jump"], self.p_null, self.max_jump)

    def m_step_dense(self, stats: np.ndarray, dense: Dense) -> Dense:
        return {"jump": hmm.jump_m_step(stats, dense["jump"], self.max_jump)}

    def decode(self, view: View, t: np.ndarray, dense: Dense, *, method: str,
               threshold: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        return base.decode(self, view, t, dense, method=method, threshold=threshold)

    def decode_pass(self, view: View, t: np.ndarray, dense: Dense, *, method: str):
        gc, post, _, loglik = hmm.forward_backward(view, t, dense["jump"], self.p_null, self.max_jump,
                                                   want_stats=False)
        if method == "viterbi":
            best = hmm.viterbi(view, t, dense["jump"], self.p_null, self.max_jump, gc)
        else:
            best = hmm.posterior_best(gc, post)
        return gc, post, best, loglik

    def pair_loglik(self, view: View, t: np.ndarray, dense: Dense) -> np.ndarray:
        return hmm.pair_loglik(view, t, dense["jump"], self.p_null, self.max_jump)
