"""Run configuration: frozen dataclasses, checked once when built, canonical JSON.

The configuration is built once (by the CLI or a job script) and passed down;
nothing below ``cli.py`` reads environment variables. ``to_json()`` gives the
canonical form stored in ``run.json`` and every manifest; ``training_key()``
is the part that must not change across ``--resume``.
"""
from __future__ import annotations

import json
from dataclasses import asdict, dataclass, field, replace
from typing import Any

from spark_align.errors import ConfigError

DIRECTIONS = ("forward", "reverse", "both")
MAX_LENGTH_LIMIT = 1000  # a 1000 x 1000 pair is a million link cells; blocks hold block_size pairs
INITS = ("uniform", "random")
DECODINGS = ("viterbi", "posterior")
SHIPPINGS = ("auto", "broadcast", "join")
SYMMETRIZATIONS = ("intersection", "union", "grow-diag", "grow-diag-final", "grow-diag-final-and",
                   "posterior")


@dataclass(frozen=True)
class CorpusConfig:
    """Where the parallel corpus is and how to read it.

    Either ``path`` (Parquet file or directory) or both ``source_text`` and
    ``target_text`` (one sentence per line) are set.
    """

    path: str | None = None
    source_text: str | None = None
    target_text: str | None = None
    source_column: str = "source"
    target_column: str = "target"
    id_column: str | None = None
    lowercase: bool = False
    max_length: int = 100
    max_ratio: float = 9.0

    def __post_init__(self) -> None:
        has_text = self.source_text is not None or self.target_text is not None
        if self.path is None and not has_text:
            raise ConfigError("corpus: give --corpus PATH, or --source-text FILE and --target-text FILE")
        if self.path is not None and has_text:
            raise ConfigError("corpus: give either --corpus or --source-text/--target-text, not both")
        if has_text and (self.source_text is None or self.target_text is None):
            raise ConfigError("corpus: --source-text and --target-text go together")
        if not 1 <= self.max_length <= MAX_LENGTH_LIMIT:
            raise ConfigError(f"max_length must be between 1 and {MAX_LENGTH_LIMIT}, got {self.max_length} "
                              f"(each pair costs (l+1)(m+1) link cells in memory)")
        if not self.max_ratio >= 1.0:
            raise ConfigError(f"max_ratio must be at least 1, got {self.max_ratio}")
        if self.source_column == self.target_column:
            raise ConfigError("source_column and target_column must differ")

    @property
    def is_text(self) -> bool:
        return self.path is None


@dataclass(frozen=True)
class StageConfig:
    """One training stage: a model kind trained for ``n_iter`` EM iterations."""

    model: str
    n_iter: int
    options: tuple[tuple[str, Any], ...] = ()

    def __post_init__(self) -> None:
        from spark_align.models import MODELS

        if self.model not in MODELS:
            raise ConfigError(f"stages: unknown model {self.model!r}; known: {', '.join(sorted(MODELS))}")
        if self.n_iter < 1:
            raise ConfigError(f"stages: {self.model} needs at least 1 iteration, got {self.n_iter}")
        try:
            MODELS[self.model](**dict(self.options))
        except (TypeError, ValueError) as exc:
            raise ConfigError(f"stages: {self.model}: {exc}") from None

    def build(self):
        from spark_align.models import get_model

        return get_model(self.model, **dict(self.options))


def parse_option_value(text: str) -> Any:
    """``true``/``false``, integers and floats as such; anything else stays a string."""
    low = text.strip().lower()
    if low in ("true", "false"):
        return low == "true"
    for kind in (int, float):
        try:
            return kind(text)
        except ValueError:
            pass
    return text.strip()


def parse_model_options(items: list[str]) -> dict[str, dict[str, Any]]:
    """``["hmm.p_null=0.1", ...]`` -> ``{"hmm": {"p_null": 0.1}}``."""
    out: dict[str, dict[str, Any]] = {}
    for item in items:
        key, sep, value = item.partition("=")
        model, dot, option = key.strip().partition(".")
        if not sep or not dot or not model or not option:
            raise ConfigError(f"--model-option takes MODEL.OPTION=VALUE (for example hmm.p_null=0.1), got {item!r}")
        out.setdefault(model, {})[option] = parse_option_value(value)
    return out


def parse_stages(text: str, options: dict[str, dict[str, Any]] | None = None) -> tuple[StageConfig, ...]:
    """Parse ``ibm1:5,hmm:5`` into stage configs; one-line errors name the bad part.

    ``options`` maps a model name to options applied to every stage of that model.
    """
    options = options or {}
    unused = set(options) - {p.strip().partition(":")[0].strip() for p in text.split(",")}
    if unused:
        raise ConfigError(f"--model-option names model(s) not in --stages: {', '.join(sorted(unused))}")
    stages = []
    for part in (p.strip() for p in text.split(",")):
        if not part:
            raise ConfigError(f"stages: empty entry in {text!r}")
        name, sep, n = part.partition(":")
        if not sep or not n.strip().isdigit():
            raise ConfigError(f"stages: {part!r} is not NAME:ITERATIONS (for example ibm1:5)")
        name = name.strip()
        stages.append(StageConfig(name, int(n), tuple(sorted(options.get(name, {}).items()))))
    return tuple(stages)


@dataclass(frozen=True)
class RunConfig:
    """Everything that determines a training run's results."""

    corpus: CorpusConfig
    stages: tuple[StageConfig, ...] = (StageConfig("ibm1", 5),)
    directions: str = "both"
    init: str = "uniform"
    seed: int = 0
    block_size: int = 2048
    decoding: str = "viterbi"
    posterior_threshold: float = 0.5
    symmetrization: str = "grow-diag-final-and"
    # How the E-step gets the table (engine/shipping.py); results are identical either way.
    shipping: str = "auto"
    table_budget_mb: float = 768.0
    # Drop translation probabilities below this after each M-step (None: keep all).
    prune_below: float | None = None
    extra: dict = field(default_factory=dict)

    def __post_init__(self) -> None:
        if not self.stages:
            raise ConfigError("stages: at least one stage is needed")
        for name, allowed in (("directions", DIRECTIONS), ("init", INITS), ("decoding", DECODINGS),
                              ("symmetrization", SYMMETRIZATIONS)):
            if getattr(self, name) not in allowed:
                raise ConfigError(f"{name} must be one of {', '.join(allowed)}, got {getattr(self, name)!r}")
        if self.block_size < 1:
            raise ConfigError(f"block_size must be at least 1, got {self.block_size}")
        if not 0.0 < self.posterior_threshold <= 1.0:
            raise ConfigError(f"posterior_threshold must be in (0, 1], got {self.posterior_threshold}")
        if self.shipping not in SHIPPINGS:
            raise ConfigError(f"shipping must be one of {', '.join(SHIPPINGS)}, got {self.shipping!r}")
        if not self.table_budget_mb > 0:
            raise ConfigError(f"table_budget_mb must be positive, got {self.table_budget_mb}")
        if self.prune_below is not None and not 0.0 <= self.prune_below < 1.0:
            raise ConfigError(f"prune_below must be in [0, 1), got {self.prune_below}")

    @property
    def direction_list(self) -> tuple[str, ...]:
        return ("forward", "reverse") if self.directions == "both" else (self.directions,)

    def to_dict(self) -> dict[str, Any]:
        d = asdict(self)
        d["stages"] = [{"model": s.model, "n_iter": s.n_iter, "options": dict(s.options)} for s in self.stages]
        return d

    def to_json(self) -> str:
        return json.dumps(self.to_dict(), sort_keys=True)

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> "RunConfig":
        d = dict(d)
        d["corpus"] = CorpusConfig(**d["corpus"])
        d["stages"] = tuple(StageConfig(s["model"], int(s["n_iter"]), tuple(sorted(s.get("options", {}).items())))
                            for s in d["stages"])
        return cls(**d)

    def training_key(self) -> dict[str, Any]:
        """What ``--resume`` must find unchanged: everything but iteration counts of stages.

        The number of iterations of each stage may change (to train longer or
        shorter), as long as the sequence of models and their options is the same.
        """
        d = self.to_dict()
        d["stages"] = [{"model": s["model"], "options": s["options"]} for s in d["stages"]]
        for output_only in ("decoding", "posterior_threshold", "symmetrization"):
            d.pop(output_only)
        for same_results in ("shipping", "table_budget_mb"):  # how parameters travel, not what they are
            d.pop(same_results, None)
        return d

    def with_stages(self, stages: tuple[StageConfig, ...]) -> "RunConfig":
        return replace(self, stages=stages)
