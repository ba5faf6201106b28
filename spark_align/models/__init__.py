"""Model registry: stage names used in ``--stages`` map to model classes."""
from __future__ import annotations

from spark_align.models.ibm1 import IBM1

MODELS: dict[str, type] = {"ibm1": IBM1}


def get_model(name: str, **options: object):
    """Instantiate the model registered as ``name``."""
    try:
        cls = MODELS[name]
    except KeyError:
        raise ValueError(f"unknown model {name!r}; known models: {', '.join(sorted(MODELS))}") from None
    return cls(**options)
