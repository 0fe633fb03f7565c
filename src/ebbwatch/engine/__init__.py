"""Execution of the same pure functions over blocks of accounts: locally, or on Dask.

``engine.dask`` is imported only when the Dask engine is asked for.
"""

from .local import chunked, map_local, run_local

__all__ = ["chunked", "map_local", "run_local"]
