"""The jobs a user runs: ingest, run, train, tune, targets."""
