"""spark-submit entry point: ``spark-align train`` (train alignment models and write the aligned corpus).

    python3 -m spark_align.packaging dist/
    spark-submit --master spark://HOST:7077 --py-files dist/spark_align-VERSION.zip \
        jobs/train.py [spark-align train options]

The arguments are those of ``spark-align train`` (see ``spark-align train --help``);
``--master`` may be left out: spark-submit's is used. The exit code is the
command's (2 for bad input or configuration, with a one-line message).
"""
import sys

COMMAND = "train"


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
