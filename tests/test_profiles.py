"""Profiles (conf/*.toml), the TOML run file of ``train --config``, setting precedence, --log-json.

No Spark session: everything here runs before one would start.
"""
from __future__ import annotations

import json
import re
from pathlib import Path

import numpy as np
import pytest

from spark_align import profiles
from spark_align.cli import build_parser, main
from spark_align.commands import common
from spark_align.commands.train import config_from_args
from spark_align.engine.em import iteration_event, progress_line
from spark_align.engine.session import DEFAULT_CONF, effective_settings
from spark_align.errors import ConfigError

REPO = Path(__file__).resolve().parent.parent
SHIPPED = ("local", "standalone", "yarn", "kubernetes")


def parse_train(argv):
    parser, _ = build_parser()
    args = parser.parse_args(["train", *argv])
    record = profiles.apply_run_file(args)
    return args, record


def write(tmp_path, text, name="run.toml"):
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return str(path)


# -- shipped profiles ----------------------------------------------------------------------
@pytest.mark.parametrize("name", SHIPPED)
def test_shipped_profile_loads_by_name_with_the_settings_users_start_from(name):
    prof = profiles.load_profile(name)
    assert prof.path == str(REPO / "conf" / f"{name}.toml")
    assert prof.description
    assert all(k.startswith("spark.") and isinstance(v, str) for k, v in prof.settings.items())
    # What every profile must say (the list): batch size, partitions, serializer, worker reuse.
    for key in ("spark.sql.execution.arrow.maxRecordsPerBatch", "spark.sql.shuffle.partitions",
                "spark.serializer", "spark.python.worker.reuse"):
        assert key in prof.settings, key
    if name == "local":
        assert prof.master == "local[*]" and "spark.driver.memory" in prof.settings
    else:  # cluster profiles size the executors
        assert {"spark.executor.memory", "spark.executor.cores", "spark.executor.memoryOverhead"} <= set(prof.settings)
    assert prof.settings["spark.python.worker.reuse"] == "true"  # TOML booleans become Spark's spelling


def test_profile_by_path_and_nested_tables_flatten_to_spark_keys(tmp_path):
    path = write(tmp_path, 'description = "mine"\n[spark]\n"spark.executor.memory" = "2g"\n'
                           'sql.shuffle.partitions = 12\n[spark.python.worker]\nreuse = false\n', "mine.toml")
    prof = profiles.load_profile(path)
    assert prof.name == "mine"
    assert prof.settings == {"spark.executor.memory": "2g", "spark.sql.shuffle.partitions": "12",
                             "spark.python.worker.reuse": "false"}
    assert "spark.sql.shuffle.partitions 12" in prof.properties().splitlines()


def test_unknown_profile_names_it_and_lists_the_known_ones():
    with pytest.raises(ConfigError) as err:
        profiles.load_profile("standalonee")
    msg = str(err.value)
    assert "--profile standalonee: no such profile" in msg
    assert all(name in msg for name in SHIPPED) and "\n" not in msg


def test_bad_toml_names_the_file_and_line(tmp_path):
    path = write(tmp_path, '[spark]\n"spark.executor.memory" = "4g"\nspark.cores = \n', "bad.toml")
    with pytest.raises(ConfigError) as err:
        profiles.load_profile(path)
    assert re.search(r"profile .*bad\.toml: not valid TOML: .*line 3", str(err.value)), err.value
    assert "\n" not in str(err.value)


@pytest.mark.parametrize("text, key", [
    ('executor_memory = "4g"\n', "'executor_memory'"),                      # a setting outside [spark]
    ('[spark]\n"spark.jars.packages" = ["a", "b"]\n', "spark.jars.packages"),  # not a scalar
    ('master = 7\n', "master"),
    ('spark = "fast"\n', "spark"),
])
def test_profile_errors_name_the_key(tmp_path, text, key):
    path = write(tmp_path, text, "p.toml")
    with pytest.raises(ConfigError) as err:
        profiles.load_profile(path)
    assert key in str(err.value) and "\n" not in str(err.value)


def test_profile_name_with_odd_characters_is_refused():
    with pytest.raises(ConfigError, match="NAME"):
        profiles.load_profile("a b")


# -- precedence ------------------------------------------------------------------------------
def test_settings_precedence_defaults_profile_submit_conf():
    prof = profiles.Profile("p", "p.toml", master="spark://from-profile:7077",
                            settings={"spark.sql.shuffle.partitions": "64", "spark.executor.memory": "4g",
                                      "spark.executor.cores": "2"})
    submitted = {"spark.master": "spark://from-submit:7077", "spark.executor.memory": "8g"}
    master, settings = effective_settings(None, {"spark.executor.cores": "1"}, prof, submitted)
    assert master == "spark://from-submit:7077"                 # spark-submit --master over the profile's
    assert settings["spark.sql.shuffle.partitions"] == "64"    # profile over the built-in default
    assert DEFAULT_CONF["spark.sql.shuffle.partitions"] != "64"
    assert settings["spark.executor.memory"] == "8g"           # spark-submit --conf over the profile
    assert settings["spark.executor.cores"] == "1"             # our --conf over everything
    assert "spark.master" not in settings
    assert effective_settings("local[3]", None, prof, submitted)[0] == "local[3]"  # explicit --master wins
    assert effective_settings(None, None, prof, {})[0] == "spark://from-profile:7077"
    # A run file's master: below spark-submit's, above the profile's.
    assert effective_settings(None, None, prof, submitted, "local[2]")[0] == "spark://from-submit:7077"
    assert effective_settings(None, None, prof, {}, "local[2]")[0] == "local[2]"
    master, settings = effective_settings(None, None, None, {})
    assert master == "local[*]" and settings["spark.ui.enabled"] == "false"


# -- the run file --------------------------------------------------------------------------
def test_example_run_file_builds_the_whole_run_config():
    args, record = parse_train(["--config", str(REPO / "conf" / "runs" / "example.toml")])
    cfg = config_from_args(args)
    assert cfg.corpus.path == "data/pairs.parquet" and cfg.corpus.max_ratio == 9.0
    assert [(s.model, s.n_iter) for s in cfg.stages] == [("ibm1", 5), ("hmm", 5)]
    assert (cfg.directions, cfg.decoding, cfg.symmetrization) == ("both", "viterbi", "grow-diag-final-and")
    assert args.run == "runs/example" and args.profile == "local"
    text = (REPO / "conf" / "runs" / "example.toml").read_text()
    assert record["text"] == text and record["path"].endswith("conf/runs/example.toml")
    import hashlib

    assert record["sha256"] == hashlib.sha256(text.encode()).hexdigest()


def test_command_line_overrides_the_file_and_defaults_fill_the_rest(tmp_path):
    path = write(tmp_path, '[corpus]\nsource_text = "a.src"\ntarget_text = "a.tgt"\nlowercase = true\n'
                           '[training]\nstages = "ibm1:2"\nblock_size = 64\n[output]\nrun = "runs/a"\n'
                           'decoding = "posterior"\n[spark]\nmaster = "local[2]"\n'
                           '[spark.conf]\n"spark.sql.shuffle.partitions" = 3\n')
    args, _ = parse_train(["--config", path, "--block-size", "128", "--run", "runs/b",
                           "--conf", "spark.sql.shuffle.partitions=5"])
    cfg = config_from_args(args)
    assert cfg.block_size == 128 and args.run == "runs/b"          # command line wins
    assert cfg.decoding == "posterior" and cfg.corpus.lowercase     # the file fills what is not given
    assert cfg.corpus.source_text == "a.src" and [s.n_iter for s in cfg.stages] == [2]
    assert cfg.posterior_threshold == 0.5 and cfg.corpus.max_length == 100  # built-in defaults
    assert args.master is None and args.fallback_master == "local[2]"  # below spark-submit's --master
    assert common.conf_pairs(args.conf) == {"spark.sql.shuffle.partitions": "5"}  # later --conf wins
    args, _ = parse_train(["--config", path, "--master", "local[3]"])
    assert args.master == "local[3]" and args.fallback_master is None


def test_without_a_file_the_built_in_defaults_hold(tmp_path):
    args, record = parse_train(["--corpus", "x.parquet", "--run", "r"])
    assert record is None
    cfg = config_from_args(args)
    assert cfg.block_size == 2048 and cfg.directions == "both" and not cfg.corpus.lowercase
    assert cfg.corpus.source_column == "source" and args.master is None and args.conf == []


def test_run_is_required_from_the_file_or_the_command_line(tmp_path):
    path = write(tmp_path, '[corpus]\npath = "x.parquet"\n')
    with pytest.raises(ConfigError, match=r"--run is required \(or output.run in the --config file\)"):
        parse_train(["--config", path])


@pytest.mark.parametrize("text, fragment", [
    ('[training]\nblok_size = 3\n', "unknown key training.blok_size"),
    ('[trianing]\nblock_size = 3\n', "unknown table [trianing]"),
    ('[training]\nblock_size = "big"\n', "training.block_size: expected an integer, got 'big'"),
    ('[training]\nblock_size = true\n', "training.block_size: expected an integer"),
    ('[training]\ndirections = "sideways"\n', "training.directions: must be one of forward, reverse, both"),
    ('[corpus]\nlowercase = "yes"\n', "corpus.lowercase: expected true or false"),
    ('[output]\nposterior_threshold = "high"\n', "output.posterior_threshold: expected a number"),
    ('[training]\nstages = [1, 2]\n', "training.stages: expected a list of NAME:ITERATIONS"),
    ('[spark.conf]\n"spark.hadoop.fs.s3a.secret.key" = "abc"\n', "looks like a credential"),
    ('[spark]\nconf = 3\n', "spark.conf: expected a table"),
    ('training = 3\n', "training must be a table"),
    ('[training\nblock_size = 3\n', "not valid TOML"),
])
def test_run_file_errors_are_one_line_naming_the_key(tmp_path, text, fragment):
    path = write(tmp_path, text + '[output]\nrun = "r"\n' if "[output]" not in text else text)
    with pytest.raises(ConfigError) as err:
        parse_train(["--config", path, "--corpus", "x.parquet"])
    msg = str(err.value)
    assert fragment in msg and path in msg and "\n" not in msg, msg


def test_missing_run_file_is_a_one_line_error(tmp_path):
    with pytest.raises(ConfigError, match="no such file"):
        parse_train(["--config", str(tmp_path / "absent.toml")])


def test_values_the_file_passes_are_still_checked_by_the_config(tmp_path):
    path = write(tmp_path, '[corpus]\npath = "x"\n[training]\nblock_size = 0\n[output]\nrun = "r"\n')
    args, _ = parse_train(["--config", path])
    with pytest.raises(ConfigError, match="block_size must be at least 1"):
        config_from_args(args)


def test_model_options_table_reaches_the_stages(tmp_path):
    parser, _ = build_parser()
    if "model_option" not in vars(parser.parse_args(["train", "--corpus", "x", "--run", "r"])):
        pytest.skip("train has no --model-option in this checkout")
    path = write(tmp_path, '[corpus]\npath = "x"\n[training]\nstages = ["ibm1:1", "hmm:2"]\n'
                           '[training.model_options.hmm]\np_null = 0.1\n[output]\nrun = "r"\n')
    args, _ = parse_train(["--config", path])
    cfg = config_from_args(args)
    assert dict(cfg.stages[1].options)["p_null"] == 0.1 and cfg.stages[0].options == ()


@pytest.mark.parametrize("argv, fragment", [
    (["--profile", "nope"], "--profile nope: no such profile"),
    (["--config", "{bad}"], "not valid TOML"),
])
def test_cli_reports_configuration_errors_in_one_line_with_exit_2(tmp_path, capsys, argv, fragment):
    bad = write(tmp_path, "[corpus\n", "bad.toml")
    argv = [a.replace("{bad}", bad) for a in argv]
    code = main(["train", "--corpus", str(tmp_path / "c.parquet"), "--run", str(tmp_path / "run"), *argv])
    err = capsys.readouterr().err
    assert code == 2
    assert err.startswith("spark-align: error: ") and fragment in err and err.count("\n") == 1, err
    assert not (tmp_path / "run").exists()


# -- credentials and --log-json ----------------------------------------------------------------
def test_credentials_are_hidden_in_what_run_json_records():
    shown = profiles.redact({"spark.hadoop.fs.s3a.secret.key": "abc", "spark.hadoop.fs.s3a.access.key": "id",
                             "spark.executor.memory": "4g"})
    assert shown == {"spark.hadoop.fs.s3a.secret.key": "<hidden>", "spark.hadoop.fs.s3a.access.key": "<hidden>",
                     "spark.executor.memory": "4g"}


def test_progress_log_writes_one_json_object_per_event(tmp_path, capsys):
    path = tmp_path / "progress.jsonl"
    metrics = {"forward": {"loglik": np.float64(-10.5), "loglik_per_word": -2.25, "perplexity": float(np.exp(2.25))}}
    record = iteration_event("ibm1", 0, 2, 5, metrics, 3.25, 3, 3.0, "runs/x/checkpoints/00-ibm1/iter-0002")
    log = common.ProgressLog(str(path))
    log("a progress line")
    log.event(record)
    log.close()
    common.ProgressLog(str(path)).event({"event": "done"})  # appends (a resumed run continues the file)
    lines = path.read_text().splitlines()
    assert capsys.readouterr().out == "a progress line\n"
    assert len(lines) == 2
    got = json.loads(lines[0])
    assert got["event"] == "iteration" and got["stage"] == 1 and got["iteration"] == 2
    assert got["metrics"]["forward"]["loglik"] == -10.5 and got["eta_seconds"] == 9.0
    # The JSON holds the figures the text line shows.
    line = progress_line("ibm1", 0, 2, 5, metrics, 3.25, 3, 3.0)
    assert f"loglik/word {got['metrics']['forward']['loglik_per_word']:.4f}" in line
    assert f"ppl {got['metrics']['forward']['perplexity']:.2f}" in line and "[stage 1 ibm1 2/5]" in line
    assert json.loads(lines[1])["event"] == "done"


def test_progress_log_to_an_unwritable_place_is_a_config_error(tmp_path):
    with pytest.raises(ConfigError, match="--log-json .*cannot write"):
        common.ProgressLog(str(tmp_path / "no" / "such" / "dir" / "p.jsonl"))


def test_properties_command_prints_a_spark_submit_properties_file(capsys):
    assert profiles.main(["standalone"]) == 0
    out = capsys.readouterr().out.splitlines()
    assert "spark.executor.memory 4g" in out and out[0].startswith("# spark_align profile standalone")
    assert profiles.main(["nope"]) == 2


def test_a_local_estep_of_one_task_keeps_one_idle_python_worker():
    """Local mode with estepThreads at least the cores (its default): one E-step task per iteration,
    which should find the worker holding the last table (Spark hands out idle workers oldest first), so
    one idle worker is kept; not otherwise, and never over the user's own setting."""
    from spark_align.engine.session import IDLE_WORKERS_CONF, effective_settings

    threads = "spark.spark_align.estepThreads"
    for conf in ({}, {threads: "2"}, {threads: "3"}):
        assert effective_settings("local[2]", conf)[1][IDLE_WORKERS_CONF] == "1", conf
    for master, conf in (("local[2]", {threads: "1"}), ("local[4]", {threads: "2"}), ("local[2]", {threads: "two"}),
                         ("local", {}), ("local[1]", {}),
                         ("local-cluster[2,2,1024]", {threads: "2"}), ("spark://host:7077", {threads: "2"})):
        assert IDLE_WORKERS_CONF not in effective_settings(master, conf)[1], (master, conf)
    assert effective_settings("local[2]", {threads: "2", IDLE_WORKERS_CONF: "2"})[1][IDLE_WORKERS_CONF] == "2"
