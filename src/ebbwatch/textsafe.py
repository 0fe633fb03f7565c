"""Making values from the data safe for the place they land: plain chat text, CSV cells."""

from __future__ import annotations

import re

_CONTROL = re.compile(r"[\x00-\x1f\x7f\u2028\u2029]")
_MENTION = re.compile("@(?!\u200b)")
_FORMULA_START = ("=", "+", "-", "@", "\t", "\r")


def plain_text(value) -> str:
    """One line of inert text: control characters and newlines become spaces; chat mention and
    link syntax (``@here``, ``<!channel>``, ``<url|text>``) is broken with a zero-width space."""
    text = str(value)
    # Most names and ids need nothing: printable (no control character, nor U+2028/9) and
    # without < > @.  Checking that is several times cheaper than the substitutions.
    if text.isprintable() and "<" not in text and ">" not in text and "@" not in text:
        return text
    text = _CONTROL.sub(" ", text)
    text = text.replace("<", "\u2039").replace(">", "\u203a")
    return _MENTION.sub("@\u200b", text)


def csv_cell(value):
    """A CSV cell that a spreadsheet will not run as a formula (OWASP CSV injection advice:
    prefix a leading =, +, -, @, tab or CR with a single quote), with control characters
    (newlines, escape sequences) replaced by spaces so a row stays one line.  JSON output keeps
    values exactly."""
    if isinstance(value, str):
        if value.startswith(_FORMULA_START):
            value = "'" + value
        return _CONTROL.sub(" ", value)
    return value
