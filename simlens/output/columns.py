"""Described table columns: one declaration gives a table's rows, units, descriptions and docs.

A :class:`ColumnSpec` names a column, its unit and its meaning, and says how its value comes from
the thing a row describes.  ``{band}`` in a name stands for every band of the survey, ``{cut}`` for
every selection cut.  :func:`table_hdu` writes the descriptions into FITS as ``TCOMMn`` cards (the
column-comment convention of the HEASARC FITS keyword dictionary, from memory) and ECSV keeps them
in its header; :func:`read_table` restores them from FITS.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable, Iterable, Sequence

import astropy.units as u
from astropy.io import fits
from astropy.table import Table

__all__ = ["ColumnSpec", "rows_from", "described_table", "table_hdu", "read_table", "reference_table"]


@dataclass(frozen=True)
class ColumnSpec:
    name: str  # may hold {band} or {cut}
    unit: str  # astropy unit string; "" for none
    description: str
    value: Callable  # (item) or (item, band) or (item, cut) -> value

    @property
    def family(self) -> str | None:
        return "band" if "{band}" in self.name else "cut" if "{cut}" in self.name else None


def rows_from(specs: Sequence[ColumnSpec], item, bands: Sequence[str] = (), cuts: Sequence[str] = ()) -> dict:
    """One row: every column's value for ``item`` (families expanded over ``bands`` and ``cuts``)."""
    row = {}
    for spec in specs:
        family = spec.family
        if family is None:
            row[spec.name] = spec.value(item)
        else:
            for key in (bands if family == "band" else cuts):
                row[spec.name.format(**{family: key})] = spec.value(item, key)
    return row


def _spec_of(specs: Sequence[ColumnSpec], bands: Sequence[str], cuts: Sequence[str]) -> dict[str, tuple]:
    """Column name -> (spec, the band or cut it stands for)."""
    out = {}
    for spec in specs:
        family = spec.family
        keys = [None] if family is None else (bands if family == "band" else cuts)
        for key in keys:
            out[spec.name if key is None else spec.name.format(**{family: key})] = (spec, key)
    return out


def described_table(rows: Sequence[dict], specs: Sequence[ColumnSpec], bands: Sequence[str] = (),
                    cuts: Sequence[str] = (), names: Iterable[str] | None = None, dtype=None) -> Table:
    """A table of ``rows`` with the unit and description of every column from ``specs`` (extra
    columns of the rows keep none).  ``names`` and ``dtype`` give the columns of an empty table."""
    by_name = _spec_of(specs, bands, cuts)
    if rows:
        table = Table(rows=list(rows), names=list(rows[0]))
    else:
        names = list(names if names is not None else by_name)
        table = Table(names=names, dtype=dtype or [float] * len(names))
    for name, column in table.columns.items():
        if name not in by_name:
            continue
        spec, key = by_name[name]
        if spec.unit:
            column.unit = u.Unit(spec.unit)
        column.description = spec.description if key is None else spec.description.format(**{spec.family: key})
    return table


def table_hdu(table: Table, name: str) -> fits.BinTableHDU:
    """A FITS binary table of ``table`` whose column descriptions become TCOMMn cards."""
    hdu = fits.BinTableHDU(table, name=name)
    for i, column in enumerate(table.columns.values(), start=1):
        if column.description:
            hdu.header[f"TCOMM{i}"] = column.description
    return hdu


def read_table(source, hdu: str) -> Table:
    """Table ``hdu`` of a FITS file (path or HDUList), with the descriptions of its TCOMMn cards."""
    if isinstance(source, fits.HDUList):
        return _described(source[hdu])
    with fits.open(source, memmap=False) as hdul:
        return _described(hdul[hdu])


def _described(hdu) -> Table:
    table = Table.read(hdu)
    for i, column in enumerate(table.columns.values(), start=1):
        comment = hdu.header.get(f"TCOMM{i}")
        if comment:
            column.description = comment
    return table


def reference_table(specs: Sequence[ColumnSpec]) -> str:
    """The columns as a Markdown table (name, unit, description), for the docs."""
    lines = ["| column | unit | description |", "|---|---|---|"]
    for spec in specs:
        lines.append(f"| `{spec.name}` | {spec.unit.replace('arcsec2', 'arcsec^2')} | {spec.description} |")
    return "\n".join(lines) + "\n"
