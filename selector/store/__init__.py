"""Readers and writers, and the layout of everything the tool keeps on disk."""
