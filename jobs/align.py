"""spark-submit entry point: ``spark-align align`` (align new sentence pairs with a finished run's tables).

    python3 -m spark_align.packaging dist/
    spark-submit --master spark://HOST:7077 --py-files dist/spark_align-VERSION.zip \
        jobs/align.py [spark-align align options]

The arguments are those of ``spark-align align`` (see ``spark-align align --help``);
``--master`` may be left out: spark-submit's is used. The exit code is the
command's (2 for bad input or configuration, with a one-line message).
"""
import sys

COMMAND = "align"


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
