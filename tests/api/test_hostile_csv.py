"""CSV cells that a spreadsheet would run as formulas are written as text, in every export."""

from __future__ import annotations

import csv
import io

import pandas as pd
import pytest

from server.web.csvsafe import safe_cell, safe_frame


@pytest.mark.parametrize(
    "value, expected",
    [
        ('=HYPERLINK("http://x","y")', '\'=HYPERLINK("http://x","y")'),
        ("+44 20", "'+44 20"),
        ("-2+3", "'-2+3"),
        ("@SUM(A1)", "'@SUM(A1)"),
        ("\tx", "'\tx"),
        ("\rx", "'\rx"),
        ("4.2.0", "4.2.0"),
        ("", ""),
        (-1.5, -1.5),
        (None, None),
    ],
)
def test_safe_cell_escapes_formula_starts_of_text_only(value, expected) -> None:  # type: ignore[no-untyped-def]
    # OWASP "CSV Injection" (from memory): = + - @ tab and CR start a formula.
    assert safe_cell(value) == expected


def test_summary_style_table_keeps_numbers_and_escapes_firmware() -> None:
    frame = pd.DataFrame({"firmware": ["=cmd|' /C calc'!A0", "4.1.0"], "rate": [-0.5, 1.25], "n": [3, 4]})
    rows = list(csv.DictReader(io.StringIO(safe_frame(frame).to_csv(index=False))))
    assert rows[0]["firmware"] == "'=cmd|' /C calc'!A0" and rows[1]["firmware"] == "4.1.0"
    assert rows[0]["rate"] == "-0.5" and rows[1]["n"] == "4"
