"""IBM Model 1 bound to the model interface: no dense parameters."""
from __future__ import annotations

from typing import ClassVar

import numpy as np

from spark_align.kernels import ibm1
from spark_align.kernels.ragged import View
from spark_align.models import base
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
        return base.decode(self, view, t, dense, method=method, threshold=threshold)

    def decode_pass(self, view: View, t: np.ndarray, dense: Dense, *, method: str):
        gc, post, loglik = ibm1.posteriors_and_loglik(view, t)
        return gc, post, ibm1.argmax_per_token(gc, post), loglik  # links are independent: Viterbi = argmax

    def pair_loglik(self, view: View, t: np.ndarray, dense: Dense) -> np.ndarray:
        return ibm1.pair_loglik(view, t)

