"""Fixtures shared by the cluster tests: the package zip and a Python that lacks spark_align."""
from __future__ import annotations

import pytest

from spark_align.packaging import build_zip
from tests.cluster.procs import bare_python


@pytest.fixture(scope="session")
def package_zip(tmp_path_factory):
    """dist/spark_align-VERSION.zip built from this checkout (what users pass with --py-files)."""
    return build_zip(str(tmp_path_factory.mktemp("dist")))


@pytest.fixture(scope="session")
def bare_py(tmp_path_factory):
    """A Python with the declared dependencies but not spark_align (see procs.bare_python)."""
    return bare_python(str(tmp_path_factory.mktemp("venv") / "bare"))
