"""Real processes for the cluster tests: free ports, process groups torn down for sure, a bare Python.

Every process is started in a new session (its own process group), so stopping it
also stops what it started (executors, Python workers); :func:`stop_group` sends
SIGTERM, waits, then SIGKILL.
"""
from __future__ import annotations

import glob
import os
import signal
import socket
import subprocess
import sys
import sysconfig
import time
import urllib.request


def free_port() -> int:
    """A TCP port on 127.0.0.1 that was free a moment ago."""
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def start_group(cmd: list[str], *, log_path: str, env: dict | None = None, cwd: str | None = None) -> subprocess.Popen:
    """Start ``cmd`` as the leader of a new process group, output to ``log_path``."""
    log = open(log_path, "ab")  # noqa: SIM115 - handed to the child; closed when the group stops
    proc = subprocess.Popen(cmd, stdout=log, stderr=subprocess.STDOUT, stdin=subprocess.DEVNULL, env=env, cwd=cwd,
                            start_new_session=True)
    proc._log_file = log  # noqa: SLF001
    return proc


def group_alive(pgid: int) -> bool:
    try:
        os.killpg(pgid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


def stop_group(proc: subprocess.Popen, grace: float = 10.0) -> None:
    """Stop ``proc`` and every process in its group (SIGTERM, then SIGKILL after ``grace`` seconds)."""
    pgid = proc.pid  # the leader's pid is the group id (start_new_session)
    for sig, wait in ((signal.SIGTERM, grace), (signal.SIGKILL, 5.0)):
        if not group_alive(pgid):
            break
        try:
            os.killpg(pgid, sig)
        except ProcessLookupError:
            break
        deadline = time.monotonic() + wait
        while time.monotonic() < deadline and group_alive(pgid):
            try:
                proc.wait(timeout=0.2)
            except subprocess.TimeoutExpired:
                pass
            # Children of the leader that outlive it are reaped by init; poll the group itself.
            time.sleep(0.1)
    try:
        proc.wait(timeout=5)
    except subprocess.TimeoutExpired:
        pass
    log = getattr(proc, "_log_file", None)
    if log is not None:
        log.close()


def wait_http(url: str, timeout: float, *, check=None, proc: subprocess.Popen | None = None, what: str = ""):
    """Poll ``url`` until it answers (and ``check(body)`` is true); returns the body."""
    deadline = time.monotonic() + timeout
    last = None
    while time.monotonic() < deadline:
        if proc is not None and proc.poll() is not None:
            raise RuntimeError(f"{what or url}: the process exited with code {proc.returncode}")
        try:
            with urllib.request.urlopen(url, timeout=2) as resp:  # noqa: S310 - loopback only
                body = resp.read()
            if check is None or check(body):
                return body
            last = body[:200]
        except OSError as exc:
            last = exc
        time.sleep(0.5)
    raise TimeoutError(f"{what or url} not ready after {timeout:.0f}s (last: {last!r})")


def bare_python(venv_dir: str) -> str:
    """A Python that has this interpreter's installed packages but not spark_align.

    A venv whose ``.pth`` adds the system site-packages directory as a plain path:
    numpy, pyarrow, pandas, pyspark and fsspec import, while the ``.pth`` files
    inside that directory (the editable install of spark_align among them) are not
    processed. What imports spark_align there must bring it (the --py-files zip).
    """
    subprocess.run([sys.executable, "-m", "venv", "--without-pip", venv_dir], check=True)
    site = glob.glob(os.path.join(venv_dir, "lib", "python3*", "site-packages"))[0]
    with open(os.path.join(site, "_system_packages.pth"), "w") as fh:
        fh.write(sysconfig.get_paths()["purelib"] + "\n")
    return os.path.join(venv_dir, "bin", "python")
