"""Pure science on arrays and tables: no files, no configuration objects."""
