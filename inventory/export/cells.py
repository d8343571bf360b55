"""Text cells that a spreadsheet would run as a formula, made harmless in every table written.

A spreadsheet opening a CSV (or reading a cell typed as a formula) runs text that begins with
``=``, ``+``, ``-`` or ``@`` as a formula, and a leading tab or carriage return can hide such
a start; a pile id, ticket or note from an input file could then compute, or call out of the
spreadsheet (CSV or formula injection; the OWASP page of that name lists these characters).

The workbook stores all text as text cells (XlsxWriter's ``write_string``, never a formula); a
CSV has no cell types, so :func:`neutralise` puts an apostrophe in front, the usual way to
say "this is text" to a spreadsheet. Only text is touched: numbers stay numbers, a negative
one included, and so does text that is a plain number such as ``-12.5``.
"""

from __future__ import annotations

import re
from typing import Any, TextIO

import pandas as pd

__all__ = ["FORMULA_STARTS", "looks_like_formula", "neutralise", "neutralised_frame", "write_csv"]

#: First characters that make a spreadsheet read a text cell as a formula.
FORMULA_STARTS = ("=", "+", "-", "@", "\t", "\r")

_PLAIN_NUMBER = re.compile(r"^[+-]?(\d+(\.\d*)?|\.\d+)([eE][+-]?\d+)?$")


def looks_like_formula(value: Any) -> bool:
    """True for text a spreadsheet would run as a formula.

    >>> [looks_like_formula(v) for v in ("=1+1", "+cmd|' /C calc'!A0", "@SUM(A1)", "\\t=1", "C1")]
    [True, True, True, True, False]
    >>> [looks_like_formula(v) for v in (-3.5, "-3.5", "-2+3")]
    [False, False, True]
    """
    return (isinstance(value, str) and value.startswith(FORMULA_STARTS)
            and not _PLAIN_NUMBER.match(value))


def neutralise(value: Any) -> Any:
    """``value`` with an apostrophe in front when it is text a spreadsheet would run.

    >>> neutralise("=1+1"), neutralise("FE1"), neutralise(-424.2)
    ("'=1+1", 'FE1', -424.2)
    """
    return "'" + value if looks_like_formula(value) else value


def neutralised_frame(frame: pd.DataFrame) -> pd.DataFrame:
    """A copy of ``frame`` with every text cell that would run as a formula neutralised
    (column names too); numeric columns are left as they are."""
    out = frame.rename(columns=lambda c: neutralise(c) if isinstance(c, str) else c)
    for col in out.columns:
        if out[col].dtype == object or pd.api.types.is_string_dtype(out[col].dtype):
            out[col] = pd.Series([neutralise(v) for v in out[col]], index=out.index,
                                 dtype=out[col].dtype)
    return out


def write_csv(frame: pd.DataFrame, stream: TextIO | None = None, **kwargs: Any) -> str | None:
    """``frame.to_csv`` with formula-like text neutralised: the one way the tool writes CSV."""
    return neutralised_frame(frame).to_csv(stream, **kwargs)
