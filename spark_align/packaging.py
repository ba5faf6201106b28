"""Build the zip that ships spark_align's code to a cluster (``spark-submit --py-files``).

    python3 -m spark_align.packaging dist/        # -> dist/spark_align-VERSION.zip

The zip holds the ``spark_align`` package's Python sources and the shipped
profiles (``conf/*.toml`` as ``spark_align/conf/``, so ``--profile NAME`` works
wherever the driver runs); the cluster's
Python needs the declared dependencies (pyspark, numpy, pyarrow, pandas,
fsspec, plus the storage backend of the run directory's scheme). The archive is
reproducible: files in sorted order with a fixed timestamp, so the same sources
give the same bytes (and the same SHA-256, printed for the record).
"""
from __future__ import annotations

import argparse
import hashlib
import os
import sys
import zipfile
from pathlib import Path

FIXED_TIME = (2020, 1, 1, 0, 0, 0)  # zip timestamps: fixed so the archive depends only on the sources


def package_files(package_dir: Path) -> list[Path]:
    """The package's ``.py`` files, sorted (no caches, no compiled files)."""
    return sorted(p for p in package_dir.rglob("*.py") if "__pycache__" not in p.parts)


def archive_members(package_dir: Path) -> list[tuple[str, Path]]:
    """(name in the zip, source file): the package's sources, then the checkout's profiles."""
    members = [(f"spark_align/{p.relative_to(package_dir).as_posix()}", p) for p in package_files(package_dir)]
    conf = package_dir.parent / "conf"
    if conf.is_dir():
        members += [(f"spark_align/conf/{p.name}", p) for p in sorted(conf.glob("*.toml"))]
    return members


def build_zip(out_dir: str, package_dir: str | None = None) -> str:
    """Write ``OUT_DIR/spark_align-VERSION.zip``; returns its path.

    ``package_dir`` defaults to the directory of the imported ``spark_align``.
    """
    from spark_align import __version__

    src = Path(package_dir) if package_dir else Path(__file__).resolve().parent
    if not (src / "__init__.py").is_file():
        raise FileNotFoundError(f"{src} is not a Python package directory")
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    target = out / f"spark_align-{__version__}.zip"
    tmp = target.with_name(f".{target.name}.tmp-{os.getpid()}")
    try:
        with zipfile.ZipFile(tmp, "w", compression=zipfile.ZIP_DEFLATED) as zf:
            for name, path in archive_members(src):
                info = zipfile.ZipInfo(name, date_time=FIXED_TIME)
                info.compress_type = zipfile.ZIP_DEFLATED
                info.external_attr = 0o644 << 16
                zf.writestr(info, path.read_bytes())
        os.replace(tmp, target)
    finally:
        if tmp.exists():
            tmp.unlink()
    return str(target)


def sha256(path: str) -> str:
    with open(path, "rb") as fh:
        return hashlib.sha256(fh.read()).hexdigest()


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(
        prog="python3 -m spark_align.packaging",
        description="Build dist/spark_align-VERSION.zip, the code to pass to spark-submit with --py-files.")
    parser.add_argument("out_dir", nargs="?", default="dist", help="output directory (default dist)")
    args = parser.parse_args(argv)
    try:
        path = build_zip(args.out_dir)
    except OSError as exc:
        print(f"spark-align: error: cannot build the package zip in {args.out_dir}: {exc}", file=sys.stderr)
        return 2
    with zipfile.ZipFile(path) as zf:
        n_files = len(zf.namelist())
    print(f"{path} ({n_files} files, {os.path.getsize(path)} bytes, sha256 {sha256(path)})")
    print(f"submit with: spark-submit --master MASTER --py-files {path} jobs/train.py --corpus ... --run ...")
    return 0


if __name__ == "__main__":
    sys.exit(main())
