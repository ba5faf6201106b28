"""Model registry: stage names used in ``--stages`` map to model classes."""
from __future__ import annotations

from spark_align.models.hmm import HMM
from spark_align.models.ibm1 import IBM1
from spark_align.models.ibm2 import IBM2, IBM2Diag

MODELS: dict[str, type] = {"ibm1": IBM1, "ibm2": IBM2, "ibm2diag": IBM2Diag, "hmm": HMM}


def get_model(name: str, **options: object):
    """Instantiate the model registered as ``name``."""
    try:
        cls = MODELS[name]
    except KeyError:
        raise ValueError(f"unknown model {name!r}; known models: {', '.join(sorted(MODELS))}") from None
    return cls(**options)
