"""The pipeline stages: ingest, clean, discretise, battery, skeleton and report, one module each."""
