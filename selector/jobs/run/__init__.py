"""The nightly run over tiles: plan, execute, merge, progress and status."""
