"""Options shared by several subcommands, and the Spark session they ask for."""
from __future__ import annotations

import argparse
from collections.abc import Sequence

from spark_align.config import CorpusConfig
from spark_align.errors import ConfigError


def conf_pairs(items: Sequence[str]) -> dict[str, str]:
    out = {}
    for item in items:
        key, sep, value = item.partition("=")
        if not sep or not key.strip():
            raise ConfigError(f"--conf takes KEY=VALUE, got {item!r}")
        out[key.strip()] = value.strip()
    return out


def add_spark_options(p: argparse.ArgumentParser) -> None:
    g = p.add_argument_group("Spark")
    g.add_argument("--master", default=None,
                   help="Spark master URL: local[*] (all cores of this machine), local[N], "
                        "local-cluster[N,cores,MB], spark://host:7077, yarn, k8s://... (default: spark-submit's "
                        "--master, else the profile's, else local[*])")
    g.add_argument("--profile", metavar="NAME|FILE",
                   help="Spark settings to start from: a profile in conf/ (local, standalone, yarn, kubernetes) "
                        "or a TOML file; --conf and spark-submit's own settings override it")
    g.add_argument("--conf", action="append", default=[], metavar="KEY=VALUE",
                   help="extra Spark setting, repeatable (for example --conf spark.executor.memory=8g); wins "
                        "over the profile")


def add_corpus_options(p: argparse.ArgumentParser, *, required: bool = True) -> None:
    g = p.add_argument_group("corpus")
    g.add_argument("--corpus", metavar="PATH",
                   help="Parquet corpus: a file or a directory of Parquet files, one sentence pair per row")
    g.add_argument("--source-text", metavar="FILE",
                   help="plain-text source side, one sentence per line (use with --target-text)")
    g.add_argument("--target-text", metavar="FILE",
                   help="plain-text target side, same number of lines as --source-text")
    g.add_argument("--source-column", default="source",
                   help="Parquet column holding source sentences (default: source)")
    g.add_argument("--target-column", default="target",
                   help="Parquet column holding target sentences (default: target)")
    g.add_argument("--id-column", help="Parquet column with a row id, carried through to the output")


def add_filter_options(p: argparse.ArgumentParser) -> None:
    g = p.add_argument_group("tokens and filters")
    g.add_argument("--lowercase", action="store_true", help="lowercase both sides before training")
    g.add_argument("--max-length", type=int, default=100,
                   help="pairs with a side longer than this many tokens are not trained on (default 100); "
                        "they stay in the output with skip_reason 'too_long'")
    g.add_argument("--max-ratio", type=float, default=9.0,
                   help="pairs whose longer side has more than this many times the tokens of the shorter "
                        "are not trained on (default 9); skip_reason 'length_ratio'")


def corpus_config(args: argparse.Namespace, **overrides) -> CorpusConfig:
    values = dict(path=args.corpus, source_text=args.source_text, target_text=args.target_text,
                  source_column=args.source_column, target_column=args.target_column, id_column=args.id_column,
                  lowercase=getattr(args, "lowercase", False), max_length=getattr(args, "max_length", 100),
                  max_ratio=getattr(args, "max_ratio", 9.0))
    values.update(overrides)
    return CorpusConfig(**values)


def session(args: argparse.Namespace):
    from spark_align.engine.session import get_session
    from spark_align.profiles import load_profile

    name = getattr(args, "profile", None)
    return get_session(args.master, conf_pairs(args.conf), profile=load_profile(name) if name else None,
                       fallback_master=getattr(args, "fallback_master", None))


def printer(line: str) -> None:
    print(line, flush=True)


class ProgressLog:
    """Progress lines to stdout and, with ``--log-json FILE``, JSON lines for dashboards.

    Called with a text line, it prints it; its ``event(record)`` (called by the
    EM loop after each iteration's line, see ``engine.em.iteration_event``)
    appends one JSON object per line to the file, flushed at once so a
    dashboard can follow it. The file is opened for appending: a resumed run
    continues it.
    """

    def __init__(self, json_path: str | None = None) -> None:
        self.json_path = json_path
        self._fh = None
        if json_path:
            try:
                self._fh = open(json_path, "a", encoding="utf-8", buffering=1)  # noqa: SIM115 - closed by close()
            except OSError as exc:
                raise ConfigError(f"--log-json {json_path}: cannot write it ({exc.strerror or exc})") from None

    def __call__(self, line: str) -> None:
        printer(line)

    def event(self, record: dict) -> None:
        if self._fh is not None:
            import json
            import time

            record = {"time": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()), **record}
            self._fh.write(json.dumps(record, sort_keys=True, default=_json_scalar) + "\n")
            self._fh.flush()

    def close(self) -> None:
        if self._fh is not None:
            self._fh.close()
            self._fh = None


def _json_scalar(obj):
    tolist = getattr(obj, "tolist", None)  # numpy scalars and arrays
    if tolist is not None:
        return tolist()
    raise TypeError(f"cannot write {type(obj).__name__} to JSON")
