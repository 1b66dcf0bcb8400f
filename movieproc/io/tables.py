"""Numeric column tables as users write them: comma- or whitespace-separated, with a header or ``#`` comments.

One reader for every tabular input (solvent differentials, curves read as columns):
:func:`read_table` sniffs the separator from the first data line, skips ``#``
comments and a leading non-numeric header line, and checks that every value is a
finite number. :func:`read_curve_table` adds the checks of a q-indexed table
(first column increasing q, a given number of columns).
"""

from __future__ import annotations

import io
from pathlib import Path

import numpy as np

from ..errors import InputError

__all__ = ["read_table", "read_curve_table"]


def _lines(path: Path) -> list[str]:
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise InputError(path, "no such file", "an existing text table") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(path, f"an unreadable file ({exc})", "a UTF-8 text table") from None
    return [line.split("#", 1)[0].strip() for line in text.splitlines()]


def _is_numeric(fields: list[str]) -> bool:
    try:
        [float(f) for f in fields]
    except ValueError:
        return False
    return True


def _split(line: str, delimiter: str | None) -> list[str]:
    return [f.strip() for f in line.split(delimiter)] if delimiter else line.split()


def read_table(path, *, what: str = "a table of numbers") -> tuple[np.ndarray, list[str]]:
    """A numeric table from a text file, its separator sniffed.

    Parameters
    ----------
    path : path-like
        Text file. Columns separated by commas, semicolons, tabs or runs of spaces
        (the first data line decides); ``#`` starts a comment; one header line of
        column names (not numbers) may come before the data.
    what : str
        What the table is, for the error messages.

    Returns
    -------
    table : ndarray, shape (n_rows, n_columns), float64
    header : list of str
        Column names of the header line (empty without one).

    Raises
    ------
    InputError
        Naming the file and line: missing file, no data, a non-numeric or non-finite
        value, rows of unequal length.
    """
    path = Path(path)
    lines = [(i + 1, line) for i, line in enumerate(_lines(path)) if line]
    if not lines:
        raise InputError(path, "no data lines", what)
    first = lines[0][1]
    delimiter = next((d for d in (",", ";", "\t") if d in first), None)
    header: list[str] = []
    if not _is_numeric(_split(first, delimiter)):
        header = _split(first, delimiter)
        lines = lines[1:]
        if not lines:
            raise InputError(path, "a header line and no data", what)
        delimiter = next((d for d in (",", ";", "\t") if d in lines[0][1]), None)
    width = len(_split(lines[0][1], delimiter))
    for number, line in lines:
        fields = _split(line, delimiter)
        if len(fields) != width:
            raise InputError(f"{path}, line {number}", f"{len(fields)} columns", f"{width} columns like line "
                             f"{lines[0][0]} ({what})")
        if not _is_numeric(fields):
            raise InputError(f"{path}, line {number}", f"non-numeric values {fields}", f"numbers ({what})")
    table = np.loadtxt(io.StringIO("\n".join(line for _, line in lines)), delimiter=delimiter, ndmin=2)
    bad = ~np.isfinite(table)
    if bad.any():
        row = int(np.argmax(bad.any(axis=1)))
        raise InputError(f"{path}, line {lines[row][0]}", "a non-finite value (nan or inf)", f"finite numbers ({what})")
    return table, header


def read_curve_table(path, *, min_columns: int = 2, max_columns: int | None = None,
                     what: str = "columns q (1/Å), curve values") -> np.ndarray:
    """A table of curves on q: first column increasing q, then one column per curve.

    Parameters
    ----------
    path : path-like
        Text file, as for :func:`read_table`.
    min_columns, max_columns : int
        Accepted numbers of columns (q included).
    what : str
        The expected columns, for the error messages.

    Returns
    -------
    ndarray, shape (n_rows, n_columns), float64

    Raises
    ------
    InputError
        As :func:`read_table`, and for a wrong number of columns, fewer than two rows or
        q not strictly increasing.
    """
    table, _ = read_table(path, what=what)
    n = table.shape[1]
    if n < min_columns or (max_columns is not None and n > max_columns):
        expected = f"{min_columns}" + (f"-{max_columns}" if max_columns and max_columns != min_columns else
                                       ("" if max_columns else " or more"))
        raise InputError(path, f"{n} column(s)", f"{expected} columns: {what}")
    if table.shape[0] < 2:
        raise InputError(path, f"{table.shape[0]} row", f"at least 2 rows ({what})")
    step = np.diff(table[:, 0])
    if np.any(step <= 0):
        row = int(np.argmax(step <= 0)) + 1
        raise InputError(path, f"q not increasing at data row {row + 1} ({table[row - 1, 0]:g} then {table[row, 0]:g})",
                         f"strictly increasing q in the first column ({what})")
    return table
