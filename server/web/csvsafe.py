"""Spreadsheet-formula escaping for every CSV the server writes (exports, summary tables).

OWASP "CSV Injection" guidance (from memory): a spreadsheet reads a cell that starts with
= + - @ tab or carriage return as a formula; a leading apostrophe makes it show as text.
"""

from __future__ import annotations

from typing import Any

import pandas as pd

FORMULA_STARTS = ("=", "+", "-", "@", "\t", "\r")


def safe_cell(value: Any) -> Any:
    """``value`` unchanged unless it is text a spreadsheet would evaluate; then ``'`` + text.

    Only text is touched: numbers (a negative rate, say) are written by the CSV writer as numbers.
    """
    if isinstance(value, str) and value.startswith(FORMULA_STARTS):
        return "'" + value
    return value


def safe_frame(frame: pd.DataFrame) -> pd.DataFrame:
    """A copy of ``frame`` with every text cell escaped (column names too)."""
    out = frame.map(safe_cell)
    out.columns = [safe_cell(c) for c in frame.columns]
    return out
