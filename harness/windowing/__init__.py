"""Windowing stage: windows over events, event vocabularies, and leakage-free splits."""
