"""The ``ebbwatch`` command: a thin shell over :mod:`ebbwatch.api`.

Each command parses options, calls one api function and renders; library errors become
``Error: …`` on stderr with the exit code their type carries (2 usage/config, 3 unusable input).
The commands live in one module per group of jobs and register themselves on ``main`` when
imported here.
"""

from . import daily_commands, review_commands, store_commands  # noqa: F401  (they register the commands)
from .base import EXIT_ALERTS, main

__all__ = ["EXIT_ALERTS", "main"]
