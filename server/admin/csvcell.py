"""Spreadsheet-formula escaping for the audit trail's CSV cells."""

from __future__ import annotations

# OWASP "CSV Injection" guidance: a text cell starting with one of these is read as a formula by
# spreadsheet programs, so it gets a leading apostrophe (shown as text, not evaluated).
_FORMULA_STARTS = ("=", "+", "-", "@", "\t", "\r")


def safe_cell(value: object) -> object:
    """``value`` unchanged unless it is text a spreadsheet would evaluate; then ``'`` + text."""
    if isinstance(value, str) and value.startswith(_FORMULA_STARTS):
        return "'" + value
    return value
