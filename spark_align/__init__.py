"""spark_align: word-alignment models (IBM Model 1, Model 2, HMM) trained by EM on Spark."""

__version__ = "0.1.0"
