"""Readers, field mapping, timestamps and validation of input (no database access)."""
