"""The code shipped to executors: the zip from ``python3 -m spark_align.packaging`` and jobs/ wrappers."""
from __future__ import annotations

import os
import subprocess
import zipfile
from pathlib import Path

import pytest

import spark_align
from spark_align.packaging import build_zip, main as packaging_main

REPO = Path(__file__).resolve().parents[2]
JOBS = ("train", "align", "export")


def run(cmd, cwd, env_extra=None):
    env = {k: v for k, v in os.environ.items() if k != "PYTHONPATH"}
    env.update(env_extra or {})
    return subprocess.run(cmd, cwd=cwd, env=env, capture_output=True, text=True, timeout=120)


def test_zip_holds_every_module_and_the_profiles_and_is_reproducible(package_zip, tmp_path):
    package = Path(spark_align.__file__).parent
    expected = {f"spark_align/{p.relative_to(package).as_posix()}" for p in package.rglob("*.py")
                if "__pycache__" not in p.parts}
    expected |= {f"spark_align/conf/{p.name}" for p in (REPO / "conf").glob("*.toml")}
    with zipfile.ZipFile(package_zip) as zf:
        names = zf.namelist()
        assert zf.testzip() is None
    assert set(names) == expected and len(names) == len(set(names))
    assert {"spark_align/conf/standalone.toml", "spark_align/kernels/hmm.py", "spark_align/cli.py"} <= set(names)
    again = build_zip(str(tmp_path / "again"))
    assert Path(again).read_bytes() == Path(package_zip).read_bytes()  # same sources, same bytes


def test_packaging_command_prints_where_the_zip_is(tmp_path, capsys):
    assert packaging_main([str(tmp_path / "dist")]) == 0
    out = capsys.readouterr().out
    assert f"{tmp_path}/dist/spark_align-{spark_align.__version__}.zip" in out and "--py-files" in out


def test_bare_python_has_the_dependencies_but_not_spark_align(bare_py, tmp_path):
    deps = run([bare_py, "-c", "import numpy, pyarrow, pandas, pyspark, fsspec"], tmp_path)
    assert deps.returncode == 0, deps.stderr
    missing = run([bare_py, "-c", "import spark_align"], tmp_path)
    assert missing.returncode == 1 and "No module named 'spark_align'" in missing.stderr


def test_code_imports_from_the_zip_alone(bare_py, package_zip, tmp_path):
    code = ("import spark_align, spark_align.cli, spark_align.engine.run, spark_align.kernels.hmm, "
            "spark_align.profiles as p; print(spark_align.__file__); print(p.load_profile('yarn').name)")
    got = run([bare_py, "-c", code], tmp_path, {"PYTHONPATH": package_zip})
    assert got.returncode == 0, got.stderr
    assert got.stdout.splitlines() == [f"{package_zip}/spark_align/__init__.py", "yarn"]


@pytest.mark.parametrize("job", JOBS)
def test_job_scripts_run_their_command_from_the_zip(bare_py, package_zip, tmp_path, job):
    got = run([bare_py, str(REPO / "jobs" / f"{job}.py"), "--help"], tmp_path, {"PYTHONPATH": package_zip})
    assert got.returncode == 0, got.stderr
    assert got.stdout.startswith(f"usage: spark-align {job} ")


def test_job_script_without_the_package_says_how_to_ship_it(bare_py, tmp_path):
    got = run([bare_py, str(REPO / "jobs" / "train.py"), "--run", "r"], tmp_path)
    assert got.returncode == 2
    assert got.stderr.count("\n") == 1 and "--py-files" in got.stderr and "spark_align.packaging" in got.stderr
