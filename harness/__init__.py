"""logtrial harness: every stage of the evaluation pipeline except detector algorithms."""

__version__ = "0.1.0"
