"""Execution of the same pure functions over blocks of accounts: locally, or on Dask."""

from .local import chunked, run_local

__all__ = ["chunked", "run_local"]
