"""Data stage: registry, acquisition, safe unpacking, ingest to event tables, template mining, parse scoring."""
