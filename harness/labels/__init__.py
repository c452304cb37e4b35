"""Labels stage: true incidents from a dataset's label scheme, and noisy replays of them as tickets."""
