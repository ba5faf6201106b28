"""Configuration profiles (Spark settings to start from) and TOML run files.

A **profile** is a TOML file of Spark settings for one kind of cluster::

    description = "Spark standalone cluster"
    # master = "spark://host:7077"      (optional; spark-submit --master or --master win)
    [spark]
    "spark.executor.memory" = "4g"
    "spark.sql.shuffle.partitions" = 64

``--profile NAME`` reads ``conf/NAME.toml`` from the current directory, else from
the source checkout's ``conf/``; ``--profile PATH`` (anything with a ``/`` or
ending in ``.toml``) reads that file. Settings are applied in this order, later
ones winning: the built-in defaults (``engine.session.DEFAULT_CONF``), the
profile, what ``spark-submit`` was given (``--conf``, ``--master``,
``spark-defaults.conf``), then the command's own ``--conf``.

A **run file** (``spark-align train --config FILE``) holds a whole training
run; its keys are the ``train`` options, grouped in tables::

    [corpus]    path, source_text, target_text, source_column, target_column,
                id_column, lowercase, max_length, max_ratio
    [training]  stages, model_options, directions, init, seed, block_size, shipping,
                table_budget_mb, prune_below, gold, gold_id_column
    [output]    run, decoding, posterior_threshold, symmetrization, log_json
    [spark]     profile, master, conf

Options given on the command line override the file; the file's ``master`` is
used only when neither ``--master`` nor spark-submit names one. The file's name, SHA-256
and text are recorded in ``run.json`` (``config_file``), so a run can be
repeated from it. Relative paths in the file are relative to the current
directory, as on the command line.

Every problem is a :class:`~spark_align.errors.ConfigError` of one line that
names the file and the key.
"""
from __future__ import annotations

import argparse
import hashlib
import os
import sys
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from spark_align.errors import ConfigError

PROFILE_KEYS = ("description", "master", "spark")

# Run-file table -> {file key: train option dest}.
RUN_FILE_KEYS: dict[str, dict[str, str]] = {
    "corpus": {"path": "corpus", "source_text": "source_text", "target_text": "target_text",
               "source_column": "source_column", "target_column": "target_column", "id_column": "id_column",
               "lowercase": "lowercase", "max_length": "max_length", "max_ratio": "max_ratio"},
    "training": {"stages": "stages", "model_options": "model_option", "directions": "directions",
                 "init": "init", "seed": "seed", "block_size": "block_size", "shipping": "shipping",
                 "table_budget_mb": "table_budget_mb", "prune_below": "prune_below", "gold": "gold",
                 "gold_id_column": "gold_id_column"},
    "output": {"run": "run", "decoding": "decoding", "posterior_threshold": "posterior_threshold",
               "symmetrization": "symmetrization", "log_json": "log_json"},
    "spark": {"profile": "profile", "master": "master", "conf": "conf"},
}
# Words that mark a Spark/Hadoop setting as a credential: never copied into run.json.
SECRET_WORDS = ("secret", "password", "token", "credential", "access.key", "accesskey", "sas")
_FIELDS_ATTR = "_run_file_fields"


# -- helpers -----------------------------------------------------------------------------
def _read_toml(path, what: str) -> tuple[dict, str]:
    """(parsed TOML, text) of a local file, an fsspec URL or a package resource; one-line errors."""
    from spark_align.store import fsspec_url

    try:
        if not isinstance(path, str):  # a profile inside the shipped zip (importlib.resources)
            raw = path.read_bytes()
        elif "://" in path:
            import fsspec

            with fsspec.open(fsspec_url(path), "rb") as fh:
                raw = fh.read()
        else:
            raw = Path(path).read_bytes()
    except FileNotFoundError:
        raise ConfigError(f"{what} {path}: no such file") from None
    except (OSError, ValueError, ImportError) as exc:
        raise ConfigError(f"{what} {path}: cannot read it ({exc})") from None
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise ConfigError(f"{what} {path}: not UTF-8 text (byte {exc.start})") from None
    try:
        return tomllib.loads(text), text
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"{what} {path}: not valid TOML: {exc}") from None


def _setting_text(value: Any, where: str) -> str:
    """A TOML scalar as the string Spark expects (booleans in lower case)."""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, (int, float, str)):
        return str(value)
    raise ConfigError(f"{where}: a Spark setting must be a string, number or boolean, "
                      f"got {type(value).__name__}")


def _flatten(table: dict, prefix: str, where: str) -> dict[str, str]:
    """Nested TOML tables -> dotted Spark keys, each starting with ``spark.``."""
    out = {}
    for key, value in table.items():
        full = f"{prefix}{key}" if prefix else key
        if isinstance(value, dict):
            out.update(_flatten(value, f"{full}.", where))
            continue
        if not full.startswith("spark."):
            full = f"spark.{full}"
        out[full] = _setting_text(value, f"{where}: {full}")
    return out


def is_secret(key: str) -> bool:
    low = key.lower()
    return any(word in low for word in SECRET_WORDS)


def redact(settings: dict[str, str]) -> dict[str, str]:
    """Settings fit for run.json: credential values replaced by ``<hidden>``."""
    return {k: ("<hidden>" if is_secret(k) else v) for k, v in settings.items()}


# -- profiles ----------------------------------------------------------------------------
@dataclass(frozen=True)
class Profile:
    """Spark settings to start from, read from ``conf/NAME.toml`` or a path."""

    name: str
    path: str
    description: str = ""
    master: str | None = None
    settings: dict[str, str] = field(default_factory=dict)

    def to_dict(self) -> dict[str, Any]:
        return {"name": self.name, "path": self.path, "master": self.master, "settings": redact(self.settings)}

    def properties(self) -> str:
        """The settings in ``spark-submit --properties-file`` form (``key value`` lines)."""
        lines = [f"# spark_align profile {self.name} ({self.path})"]
        if self.master:
            lines.append(f"spark.master {self.master}")
        lines += [f"{k} {v}" for k, v in sorted(self.settings.items())]
        return "\n".join(lines) + "\n"


def profile_dirs() -> list[Path]:
    """Where profile names are looked up: ./conf, then the source checkout's conf/."""
    dirs = [Path.cwd() / "conf"]
    checkout = Path(__file__).resolve().parent.parent / "conf"
    if checkout not in dirs:
        dirs.append(checkout)
    return dirs


def _shipped():
    """The profiles inside the package zip (``spark_align/conf/``), if the code runs from one."""
    from importlib.resources import files

    try:
        conf = files("spark_align").joinpath("conf")
        return {p.name.removesuffix(".toml"): p for p in conf.iterdir() if p.name.endswith(".toml")}
    except (FileNotFoundError, NotADirectoryError, OSError):
        return {}


def known_profiles() -> list[str]:
    names = set(_shipped())
    for d in profile_dirs():
        if d.is_dir():
            names.update(p.stem for p in d.glob("*.toml"))
    return sorted(names)


def find_profile(name_or_path: str):
    """Path of a profile given by name (looked up in :func:`profile_dirs`, then in the package zip)
    or by path."""
    if "/" in name_or_path or name_or_path.endswith(".toml") or "://" in name_or_path:
        return name_or_path
    if not name_or_path or not name_or_path.replace("-", "").replace("_", "").isalnum():
        raise ConfigError(f"--profile {name_or_path!r}: a profile is a NAME (letters, digits, -, _) or a path")
    for d in profile_dirs():
        candidate = d / f"{name_or_path}.toml"
        if candidate.is_file():
            return str(candidate)
    shipped = _shipped().get(name_or_path)
    if shipped is not None:
        return shipped
    known = ", ".join(known_profiles()) or "none"
    looked = ", ".join(str(d) for d in profile_dirs())
    raise ConfigError(f"--profile {name_or_path}: no such profile (known: {known}; looked in {looked})")


def load_profile(name_or_path: str) -> Profile:
    """Read and check a profile; errors name the file and the key."""
    found = find_profile(name_or_path)
    data, _ = _read_toml(found, "profile")
    path = found if isinstance(found, str) else f"{name_or_path} (shipped in the package)"
    where = f"profile {path}"
    for key in data:
        if key not in PROFILE_KEYS:
            raise ConfigError(f"{where}: unknown key {key!r} (known: {', '.join(PROFILE_KEYS)}; Spark settings go "
                              f"in the [spark] table)")
    for key in ("description", "master"):
        if key in data and not isinstance(data[key], str):
            raise ConfigError(f"{where}: {key} must be a string, got {type(data[key]).__name__}")
    spark = data.get("spark", {})
    if not isinstance(spark, dict):
        raise ConfigError(f"{where}: spark must be a table of Spark settings, got {type(spark).__name__}")
    if not isinstance(found, str):
        name = name_or_path
    else:
        name = Path(path).stem if "://" not in path else path.rsplit("/", 1)[-1].removesuffix(".toml")
    return Profile(name=name, path=path, description=data.get("description", ""),
                   master=data.get("master") or None, settings=_flatten(spark, "", where))


# -- the train command's run file ----------------------------------------------------------
@dataclass(frozen=True)
class _Field:
    dest: str
    default: Any
    kind: str                 # "str", "int", "float", "bool", "append"
    choices: tuple | None
    required: bool


def defer_defaults(parser: argparse.ArgumentParser) -> None:
    """Let a run file fill options the command line leaves out.

    The defaults of the options a run file may set are moved aside (the parsed
    value is ``None`` when the option is not given) and handed to
    :func:`apply_run_file` through the parsed namespace.
    """
    dests = {dest for table in RUN_FILE_KEYS.values() for dest in table.values()}
    fields = {}
    for action in parser._actions:  # noqa: SLF001 - argparse has no public walk over actions
        if action.dest not in dests:
            continue
        if isinstance(action, argparse._AppendAction):  # noqa: SLF001
            kind = "append"
        elif isinstance(action, argparse._StoreTrueAction):  # noqa: SLF001
            kind = "bool"
        elif action.type is int:
            kind = "int"
        elif action.type is float:
            kind = "float"
        else:
            kind = "str"
        fields[action.dest] = _Field(action.dest, action.default, kind,
                                     tuple(action.choices) if action.choices else None, action.required)
        if kind != "append":
            action.default = None
        action.required = False
    parser.set_defaults(**{_FIELDS_ATTR: fields})


def _file_value(f: _Field, value: Any, where: str) -> Any:
    """Check one run-file value against the option it stands for; returns the option's value."""
    if f.kind == "bool":
        if not isinstance(value, bool):
            raise ConfigError(f"{where}: expected true or false, got {value!r}")
        return value
    if f.kind == "int":
        if isinstance(value, bool) or not isinstance(value, int):
            raise ConfigError(f"{where}: expected an integer, got {value!r}")
        return value
    if f.kind == "float":
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise ConfigError(f"{where}: expected a number, got {value!r}")
        return float(value)
    if f.dest == "stages" and isinstance(value, list):
        if not value or not all(isinstance(v, str) for v in value):
            raise ConfigError(f"{where}: expected a list of NAME:ITERATIONS strings, got {value!r}")
        value = ",".join(value)
    if not isinstance(value, str):
        raise ConfigError(f"{where}: expected a string, got {value!r}")
    if f.choices and value not in f.choices:
        raise ConfigError(f"{where}: must be one of {', '.join(map(str, f.choices))}, got {value!r}")
    return value


def _append_items(dest: str, value: Any, where: str) -> list[str]:
    if not isinstance(value, dict):
        raise ConfigError(f"{where}: expected a table, got {value!r}")
    if dest == "conf":
        items = _flatten(value, "", where)
        for key in items:
            if is_secret(key):
                raise ConfigError(f"{where}: {key} looks like a credential; the run file is copied into "
                                  f"run.json, so pass it with --conf or spark-defaults.conf instead")
        return [f"{k}={v}" for k, v in items.items()]
    out = []  # model_options: {model: {option: value}}
    for model, options in value.items():
        if not isinstance(options, dict):
            raise ConfigError(f"{where}.{model}: expected a table of options, got {options!r}")
        for option, v in options.items():
            if isinstance(v, dict | list):
                raise ConfigError(f"{where}.{model}.{option}: expected a string, number or boolean")
            out.append(f"{model}.{option}={_setting_text(v, f'{where}.{model}.{option}')}")
    return out


def read_run_file(path: str, fields: dict[str, _Field]) -> tuple[dict[str, Any], dict[str, Any]]:
    """Read and check a run file; returns ({option dest: value}, config_file record for run.json)."""
    data, text = _read_toml(path, "run file")
    where = f"run file {path}"
    values: dict[str, Any] = {}
    for table, entries in data.items():
        if table not in RUN_FILE_KEYS:
            raise ConfigError(f"{where}: unknown table [{table}] (known: {', '.join(RUN_FILE_KEYS)})")
        if not isinstance(entries, dict):
            raise ConfigError(f"{where}: {table} must be a table ([{table}]), got {entries!r}")
        for key, value in entries.items():
            dest = RUN_FILE_KEYS[table].get(key)
            if dest is None or dest not in fields:
                known = ", ".join(k for k, d in RUN_FILE_KEYS[table].items() if d in fields)
                raise ConfigError(f"{where}: unknown key {table}.{key} (known in [{table}]: {known})")
            f = fields[dest]
            if f.kind == "append":
                values[dest] = _append_items(dest, value, f"{where}: {table}.{key}")
            else:
                values[dest] = _file_value(f, value, f"{where}: {table}.{key}")
    record = {"path": path if "://" in path else os.path.abspath(path),
              "sha256": hashlib.sha256(text.encode("utf-8")).hexdigest(), "text": text}
    return values, record


def apply_run_file(args: argparse.Namespace) -> dict[str, Any] | None:
    """Fill ``args`` from ``--config`` (if given) and the deferred defaults, in place.

    Precedence: the command line, then the run file, then the built-in default.
    Returns the ``config_file`` record for run.json (None without ``--config``).
    """
    fields: dict[str, _Field] = getattr(args, _FIELDS_ATTR)
    values, record = ({}, None)
    if getattr(args, "config", None):
        values, record = read_run_file(args.config, fields)
    # The file's master is a fallback below spark-submit's --master (a run file written for a
    # laptop must not pull a submitted job into local mode); --master on the command line wins.
    args.fallback_master = values.pop("master", None) if getattr(args, "master", None) is None else None
    for dest, f in fields.items():
        given = getattr(args, dest, None)
        if f.kind == "append":
            setattr(args, dest, list(values.get(dest, [])) + list(given or []))
        elif given is None:
            setattr(args, dest, values.get(dest, f.default))
        if f.required and getattr(args, dest) is None:
            table = next(t for t, keys in RUN_FILE_KEYS.items() if dest in keys.values())
            key = next(k for k, d in RUN_FILE_KEYS[table].items() if d == dest)
            raise ConfigError(f"--{dest.replace('_', '-')} is required (or {table}.{key} in the --config file)")
    return record


def main(argv: list[str] | None = None) -> int:
    """``python3 -m spark_align.profiles NAME``: print a profile as a spark-submit properties file."""
    parser = argparse.ArgumentParser(
        prog="python3 -m spark_align.profiles",
        description="Print a profile's settings as a spark-submit --properties-file (for settings that must be "
                    "known before the driver starts, such as spark.driver.memory).")
    parser.add_argument("profile", nargs="?", help="profile name or path; without it, list the known profiles")
    args = parser.parse_args(argv)
    try:
        if args.profile is None:
            for name in known_profiles():
                print(f"{name}\t{load_profile(name).description}")
            return 0
        sys.stdout.write(load_profile(args.profile).properties())
    except ConfigError as exc:
        print(f"spark-align: error: {exc}", file=sys.stderr)
        return 2
    return 0


if __name__ == "__main__":
    sys.exit(main())
