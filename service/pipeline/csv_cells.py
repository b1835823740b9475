"""Text cells of the CSV answers, guarded against spreadsheet formula injection.

A spreadsheet may run a cell that begins with ``=``, ``+``, ``-`` or ``@`` (or a tab or
carriage return) as a formula; a tag name such as ``=HYPERLINK(...)`` would then run on the
engineer's machine.  Every *text* cell (tag names in headers and row labels) that begins so
is written with a leading apostrophe, which spreadsheets show as text (OWASP, "CSV
Injection", common practice).  Numbers are written by ``repr`` and are never guarded: a
negative number stays a number.
"""

from __future__ import annotations

__all__ = ["FORMULA_STARTS", "text_cell"]

FORMULA_STARTS = ("=", "+", "-", "@", "\t", "\r")


def text_cell(text: str) -> str:
    """``text`` as a CSV text cell: prefixed with ``'`` when a spreadsheet could run it."""
    return "'" + text if text.startswith(FORMULA_STARTS) else text
