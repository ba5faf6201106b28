"""The kernels are pure numpy: importing them must not import pyspark."""
import subprocess
import sys


def test_kernels_and_models_do_not_import_pyspark():
    code = ("import sys, spark_align.kernels.ragged, spark_align.kernels.ibm1, spark_align.kernels.ibm2, "
            "spark_align.kernels.hmm, spark_align.models; "
            "print(any(m == 'pyspark' or m.startswith('pyspark.') for m in sys.modules))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout.strip()
    assert out == "False"
