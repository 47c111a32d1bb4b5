"""Readers and writers, one module per file format."""
