"""The invented mock sky and the demo run."""
