"""Output stage: reports (tables, plots) and the regression gate."""
