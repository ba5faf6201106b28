"""IBM Model 2 (classic, bounded table) and its diagonal-favouring reparameterisation.

The maths lives in :mod:`spark_align.kernels.ibm2`; these classes bind it to the
:class:`~spark_align.models.base.AlignmentModel` protocol.
"""
from __future__ import annotations

from numbers import Integral, Real
from typing import ClassVar

import numpy as np

from spark_align.kernels import ibm2
from spark_align.kernels.ragged import View
from spark_align.models import base
from spark_align.models.base import Dense


def check_options(model: str, options: dict, defaults: dict) -> dict:
    """Fill defaults and reject unknown option names (shared by the models in this package)."""
    unknown = sorted(set(options) - set(defaults))
    if unknown:
        raise ValueError(f"{model} got unknown option(s) {unknown}; known options: {sorted(defaults)}")
    return {**defaults, **options}


def check_int(model: str, name: str, value: object, low: int, high: int) -> int:
    if isinstance(value, bool) or not isinstance(value, Integral) or not low <= value <= high:
        raise ValueError(f"{model} option {name} must be an integer in [{low}, {high}], got {value!r}")
    return int(value)


def check_real(model: str, name: str, value: object, low: float, high: float, *,
               open_low: bool = False, open_high: bool = False) -> float:
    ok = isinstance(value, Real) and not isinstance(value, bool) and np.isfinite(value)
    if ok:
        ok = (value > low if open_low else value >= low) and (value < high if open_high else value <= high)
    if not ok:
        lo, hi = "(" if open_low else "[", ")" if open_high else "]"
        raise ValueError(f"{model} option {name} must be a number in {lo}{low}, {high}{hi}, got {value!r}")
    return float(value)


class IBM2:
    """IBM Model 2: lexical table plus the alignment table a(i | j, l, m), bounded at ``max_length_cap``.

    Options: ``max_length_cap`` (int, default 20): lengths up to the cap get the
    classic free table; longer sides share the capped rows on a relative scale
    (see :mod:`spark_align.kernels.ibm2`). 20 keeps the table at 48,510 entries
    (about 0.4 MB), small enough for a JSON manifest, while covering most
    short-segment sentences exactly; 30 would be 230,640 entries.
    Dense parameters: ``{"align_table": float64 (table_size,)}``.
    """

    name: ClassVar[str] = "ibm2"
    kernel_version: ClassVar[str] = "1"

    def __init__(self, **options: object) -> None:
        opts = check_options(self.name, options, {"max_length_cap": 20})
        self.cap = check_int(self.name, "max_length_cap", opts["max_length_cap"], 1, 200)

    def dense_size(self) -> int:
        return ibm2.table_size(self.cap)

    def init_dense(self, previous: Dense | None) -> Dense:
        prev = (previous or {}).get("align_table")
        if prev is not None and len(prev) == self.dense_size():
            return {"align_table": np.array(prev, dtype=np.float64)}
        return {"align_table": ibm2.uniform_table(self.cap)}

    def e_step(self, view: View, t: np.ndarray, dense: Dense) -> tuple[np.ndarray, np.ndarray, float]:
        return ibm2.e_step(view, t, dense["align_table"], self.cap)

    def m_step_dense(self, stats: np.ndarray, dense: Dense) -> Dense:
        return {"align_table": ibm2.normalize_table(stats, dense["align_table"], self.cap)}

    def decode(self, view: View, t: np.ndarray, dense: Dense, *, method: str,
               threshold: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        return base.decode(self, view, t, dense, method=method, threshold=threshold)

    def decode_pass(self, view: View, t: np.ndarray, dense: Dense, *, method: str):
        gc, post = ibm2.posteriors(view, t, dense["align_table"], self.cap)
        return gc, post, ibm2.viterbi_from_posteriors(gc, post)[0], None

    def pair_loglik(self, view: View, t: np.ndarray, dense: Dense) -> np.ndarray:
        return ibm2.pair_loglik(view, t, dense["align_table"], self.cap)


class IBM2Diag:
    """Diagonal-favouring Model 2: a(0|.) = p_null, a(i|j,l,m) proportional to exp(-lambda |i/l - j/m|).

    Options: ``p_null`` (default 0.08, the paper's default as remembered, not
    re-checked; fixed during training), ``init_lambda`` (default 4.0, likewise
    the paper's starting value from memory), ``learn_lambda`` (default True:
    re-estimate lambda in every M-step), ``max_length_cap`` (default 30: the
    lambda statistics are exact for pairs up to 30 words a side and
    approximate beyond; the statistics vector has 30 * 465 + 1 entries).
    Dense parameters: ``{"lambda": float64 (1,)}``.
    """

    name: ClassVar[str] = "ibm2diag"
    kernel_version: ClassVar[str] = "1"

    def __init__(self, **options: object) -> None:
        opts = check_options(self.name, options, {"p_null": 0.08, "init_lambda": 4.0,
                                                  "learn_lambda": True, "max_length_cap": 30})
        self.p_null = check_real(self.name, "p_null", opts["p_null"], 0.0, 1.0, open_low=True, open_high=True)
        self.init_lambda = check_real(self.name, "init_lambda", opts["init_lambda"], 0.0, ibm2.LAMBDA_MAX)
        if not isinstance(opts["learn_lambda"], bool):
            raise ValueError(f"{self.name} option learn_lambda must be true or false, got {opts['learn_lambda']!r}")
        self.learn_lambda = opts["learn_lambda"]
        self.cap = check_int(self.name, "max_length_cap", opts["max_length_cap"], 1, 100)

    def dense_size(self) -> int:
        return 1 + ibm2.diag_n_contexts(self.cap)

    def init_dense(self, previous: Dense | None) -> Dense:
        prev = (previous or {}).get("lambda")
        lam = float(prev[0]) if prev is not None and len(prev) == 1 else self.init_lambda
        return {"lambda": np.array([lam])}

    def e_step(self, view: View, t: np.ndarray, dense: Dense) -> tuple[np.ndarray, np.ndarray, float]:
        counts, feature, mass, loglik = ibm2.diag_e_step(view, t, self.p_null, float(dense["lambda"][0]), self.cap)
        return counts, np.concatenate([[feature], mass]), loglik

    def m_step_dense(self, stats: np.ndarray, dense: Dense) -> Dense:
        lam = float(dense["lambda"][0])
        if self.learn_lambda:
            lam = ibm2.diag_lambda_m_step(float(stats[0]), stats[1:], lam, self.cap)
        return {"lambda": np.array([lam])}

    def decode(self, view: View, t: np.ndarray, dense: Dense, *, method: str,
               threshold: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        return base.decode(self, view, t, dense, method=method, threshold=threshold)

    def decode_pass(self, view: View, t: np.ndarray, dense: Dense, *, method: str):
        gc, post = ibm2.diag_posteriors(view, t, self.p_null, float(dense["lambda"][0]))
        return gc, post, ibm2.viterbi_from_posteriors(gc, post)[0], None

    def pair_loglik(self, view: View, t: np.ndarray, dense: Dense) -> np.ndarray:
        return ibm2.diag_pair_loglik(view, t, self.p_null, float(dense["lambda"][0]))
