"""Tables users give simlens (a finder's scores or detections, a lens catalogue): read once here,
with every problem reported in one line that names the file, the column and the row.

CSV, ECSV and FITS are read by suffix (``.fits``/``.fit``/``.fz``: FITS, ``.ecsv``: ECSV, anything
else: CSV).  The files are only read, never changed.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
from astropy.table import Table

from .errors import SimlensError, clip

__all__ = ["read_user_table", "number_column", "whole_number_column"]


def read_user_table(path: str | Path, what: str, required: tuple[str, ...] = ()) -> Table:
    """The table at ``path`` (``what`` names it in errors: "scores file", "lens catalogue"), with
    at least one row and the ``required`` columns."""
    path = Path(path)
    if not path.is_file():
        raise SimlensError(f"{path}: no such {what}")
    suffix = path.suffix.lower()
    fmt = None if suffix in (".fits", ".fit", ".fz") else "ascii.ecsv" if suffix == ".ecsv" else "ascii.csv"
    try:
        table = Table.read(path, format=fmt) if fmt else Table.read(path)
    except Exception as exc:  # astropy raises many kinds for unreadable tables
        raise SimlensError(f"{path}: cannot be read as a table ({type(exc).__name__}: {clip(exc)})") from None
    missing = [c for c in required if c not in table.colnames]
    if missing:
        wanted = ", ".join(required[:-1]) + " and " + required[-1] if len(required) > 1 else required[0]
        raise SimlensError(f"{path}: needs columns {wanted}; missing {', '.join(missing)} "
                           f"(found: {clip(', '.join(table.colnames))})")
    if len(table) == 0:
        raise SimlensError(f"{path}: holds no rows")
    return table


def number_column(path: str | Path, table: Table, column: str, finite: bool = True) -> np.ndarray:
    """A column as floats; one line naming the first row that is empty, not a number or (with
    ``finite``) not finite."""
    values = table[column]
    masked = getattr(values, "mask", None)
    if masked is not None and np.any(masked):
        row = int(np.flatnonzero(np.asarray(masked))[0])
        raise SimlensError(f"{path}: {column} is empty in row {row + 1}")
    try:
        numbers = np.asarray(values, dtype=float)
    except (TypeError, ValueError):
        for row, value in enumerate(values):
            try:
                float(value)
            except (TypeError, ValueError):
                raise SimlensError(f"{path}: {column} must be numbers; row {row + 1} has "
                                   f"{clip(repr(value))}") from None
        raise SimlensError(f"{path}: {column} must be numbers") from None
    if finite and not np.all(np.isfinite(numbers)):
        rows = ", ".join(str(r + 1) for r in np.flatnonzero(~np.isfinite(numbers))[:5])
        raise SimlensError(f"{path}: {column} has non-finite values (rows {rows})")
    return numbers


def whole_number_column(path: str | Path, table: Table, column: str) -> np.ndarray:
    """A column of ids: whole numbers (``0.5`` is refused, not truncated), as int64."""
    numbers = number_column(path, table, column)
    whole = numbers == np.round(numbers)
    if not whole.all():
        row = int(np.flatnonzero(~whole)[0])
        raise SimlensError(f"{path}: {column} must be whole numbers; row {row + 1} has {numbers[row]!r}")
    return numbers.astype(np.int64)
