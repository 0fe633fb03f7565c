"""Execution of the same pure functions over blocks of accounts: locally, or on Dask.

``engine.dask`` is imported only when the Dask engine is asked for.
"""

from .local import DEFAULT_CHUNK_SIZE, chunked, default_threads, run_local

__all__ = ["DEFAULT_CHUNK_SIZE", "chunked", "default_threads", "run_local"]
