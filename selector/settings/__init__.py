"""Settings: the configuration file, its validation, and how catalogue columns map onto roles."""
