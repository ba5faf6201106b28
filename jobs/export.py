"""spark-submit entry point: ``spark-align export`` (export a run's links or lexical tables).

    python3 -m spark_align.packaging dist/
    spark-submit --master spark://HOST:7077 --py-files dist/spark_align-VERSION.zip \
        jobs/export.py [spark-align export options]

The arguments are those of ``spark-align export`` (see ``spark-align export --help``);
``--master`` may be left out: spark-submit's is used. The exit code is the
command's (2 for bad input or configuration, with a one-line message).
"""
import sys

COMMAND = "export"


def main() -> int:
    try:
        from spark_align.cli import main as cli_main
    except ModuleNotFoundError as exc:
        print(f"spark-align: error: cannot import {exc.name} ({exc}); ship the package with --py-files "
              f"dist/spark_align-VERSION.zip (built by: python3 -m spark_align.packaging dist/) and install "
              f"its dependencies (pyspark, numpy, pyarrow, pandas, fsspec) in the cluster's Python",
              file=sys.stderr)
        return 2
    return cli_main([COMMAND, *sys.argv[1:]])


if __name__ == "__main__":
    sys.exit(main())
