"""Making values from the data safe for the place they land: plain chat text, CSV cells."""

from __future__ import annotations

import re

_CONTROL = re.compile(r"[\x00-\x1f\x7f\u2028\u2029]")
_FORMULA_START = ("=", "+", "-", "@", "\t", "\r")


def plain_text(value) -> str:
    """One line of inert text: control characters and newlines become spaces; chat mention and
    link syntax (``@here``, ``<!channel>``, ``<url|text>``) is broken with a zero-width space."""
    text = _CONTROL.sub(" ", str(value))
    text = text.replace("<", "\u2039").replace(">", "\u203a")
    return text.replace("@", "@\u200b")


def csv_cell(value):
    """A CSV cell that a spreadsheet will not run as a formula (OWASP CSV injection advice:
    prefix a leading =, +, -, @, tab or CR with a single quote)."""
    if isinstance(value, str) and value.startswith(_FORMULA_START):
        return "'" + value
    return value
