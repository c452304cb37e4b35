"""Running stage: experiment grids, the runner, execution engines and run tracking."""
