"""CSV files the web app hands out, made safe to open in a spreadsheet.

A spreadsheet treats a cell that begins with ``=``, ``+``, ``-`` or ``@`` as a formula, and a leading tab or
carriage return can hide one; a coordinator's detector label ``=HYPERLINK(...)`` would run when the export is
opened.  Following the OWASP guidance on CSV injection (docs/references.md), every such *text* cell gets a
leading single quote, which spreadsheets show as text.  Numbers (``-0.5``, ``+3``, ``-1.2e-05``) are left as they
are, so the numeric columns stay numbers.  The quote stays in the file: a detector named ``=A`` is exported as
``'=A``.
"""

from __future__ import annotations

import csv
import io
import re

FORMULA_START = ("=", "+", "-", "@", "\t", "\r", "\0")  # OWASP's list; ASVS 1.2.10 adds the null character
_NUMBER = re.compile(r"[+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?")


def safe_cell(value: str) -> str:
    """The cell as a spreadsheet should see it: quoted with ``'`` when it could start a formula."""
    if value.startswith(FORMULA_START) and not _NUMBER.fullmatch(value):
        return "'" + value
    return value


def neutralise_csv(text: str) -> str:
    """A CSV text with every cell passed through :func:`safe_cell` (quoting otherwise as pandas writes it)."""
    out = io.StringIO()
    writer = csv.writer(out, lineterminator="\n")
    for row in csv.reader(io.StringIO(text, newline="")):
        writer.writerow([safe_cell(c) for c in row])
    return out.getvalue()
