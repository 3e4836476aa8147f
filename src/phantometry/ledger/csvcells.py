r"""Spreadsheet-safe text cells for the ledger CSV, reversibly (CSV formula injection).

A spreadsheet opening a CSV file runs a cell that starts with ``=``, ``+``, ``-`` or ``@``
(and, in some programs, one starting with a tab or a carriage return) as a formula. The
OWASP "CSV Injection" guidance (owasp.org/www-community/attacks/CSV_Injection) is to prefix
such cells with a single quote, so that they are shown as text. Labels come from users and
headers (a scanner called ``=HYPERLINK(...)``), so :func:`neutralise` does that for every text
cell ``ledger export`` writes, and :func:`restore` undoes it on ``ledger import``.

The escape is exact for every string. A text is prefixed with one ``'`` when, after any
leading quotes, it starts with one of :data:`TRIGGERS`; so ``=x`` is written ``'=x`` and a
label that really is ``'=x`` is written ``''=x``. :func:`restore` removes one leading quote
from exactly those cells (one or more quotes, then a trigger) and leaves every other cell as
it is, so ``restore(neutralise(s)) == s`` for all ``s`` and a cell such as ``'s-Hertogenbosch``
(quote, then a letter) is written unchanged.

Numbers are not text cells: the numeric columns (``value``, ``uncertainty``, ``band_low``,
``band_high``) keep their sign (``-0.25``) and the times are ISO 8601, which never start with a
trigger.

:func:`format_row` writes a CSV line (RFC 4180 quoting, ``\n`` line ends). Python's
:func:`csv.writer` with ``lineterminator="\n"`` leaves a cell holding a lone carriage return
unquoted, which splits the row when the file is read back; here every cell holding a comma, a
double quote, ``\n`` or ``\r`` is quoted.
"""

from __future__ import annotations

#: First characters that make a spreadsheet read a cell as a formula (OWASP CSV Injection).
TRIGGERS = ("=", "+", "-", "@", "\t", "\r")
QUOTE = "'"


def _needs_quote(text: str) -> bool:
    """True when ``text`` is (quotes and then) a trigger character followed by anything."""
    rest = text.lstrip(QUOTE)
    return rest[:1] in TRIGGERS and rest != ""


def neutralise(text: str) -> str:
    """The cell text a spreadsheet shows as text: ``'`` + ``text`` when needed (see the module notes).

    Examples
    --------
    >>> neutralise("=SUM(A1:A9)"), neutralise("'=x"), neutralise("PET-CT 1"), neutralise("-")
    ("'=SUM(A1:A9)", "''=x", 'PET-CT 1', "'-")
    """
    return QUOTE + text if _needs_quote(text) else text


def restore(cell: str) -> str:
    """The text :func:`neutralise` was given: one leading quote removed where it added one.

    Examples
    --------
    >>> restore("'=SUM(A1:A9)"), restore("''=x"), restore("'s-Hertogenbosch")
    ('=SUM(A1:A9)', "'=x", "'s-Hertogenbosch")
    """
    return cell[1:] if cell.startswith(QUOTE) and _needs_quote(cell) else cell


def _quoted(cell: str) -> str:
    if any(ch in cell for ch in ',"\r\n'):
        return '"' + cell.replace('"', '""') + '"'
    return cell


def format_row(cells: list[str]) -> str:
    r'''One CSV line: cells joined by commas, quoted where needed, ending in ``\n``.

    Examples
    --------
    >>> format_row(["a", "b,c", 'say "hi"', "x\ry", ""])
    'a,"b,c","say ""hi""","x\ry",\n'
    '''
    return ",".join(_quoted(c) for c in cells) + "\n"


__all__ = ["QUOTE", "TRIGGERS", "format_row", "neutralise", "restore"]
