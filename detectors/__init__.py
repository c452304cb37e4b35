"""Detector implementations behind the one contract (fit on windows, score per window)."""
