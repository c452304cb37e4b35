"""Simulation stage: the built-in radar-relay fleet (scenario config, failure modes, generator)."""
