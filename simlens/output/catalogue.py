"""The run's catalogues (truth, subhalos, ...) assembled from one table of every shard, with
bounded memory.

The shards' tables are found from their headers (read here as the FITS standard lays them out),
read as raw records with numpy (no astropy Table or HDU per shard: building them cost the parent's
assembly a quarter of a serial run) and gathered in chunks of whole shards (at least CHUNK_ROWS
rows, or all that remain).  Each chunk becomes one astropy Table, its columns converted as astropy
reads them (text, logicals, native byte order), with the first shard's units and descriptions.
The ECSV file gets its header once and then each chunk's data lines; the FITS file one
binary-table header with the total row count (string columns as wide as the widest shard's, found
from the headers) and then each chunk's fixed-size rows, padded to the FITS block size.  Memory
stays at about one chunk's table whatever the number of systems (bench/bench_memory.py).  A table
with scaled, null-flagged, multi-dimensional or variable-length columns, which raw records would
misread, is read through astropy shard by shard instead.
"""

from __future__ import annotations

import io
import math
import re
from dataclasses import dataclass
from pathlib import Path
from typing import Sequence

import numpy as np
from astropy.io import fits
from astropy.table import Column, MaskedColumn, Table, vstack

from .columns import read_table, table_hdu
from .atomic import atomic_path

__all__ = ["write_catalogue", "table_layout", "TableLayout"]

BLOCK = 2880
CHUNK_ROWS = 20_000


def _with_widths(table: Table, widths: dict) -> Table:
    table = table.copy(copy_data=False)
    for name, width in widths.items():
        table[name] = table[name].astype(f"U{max(width, 1)}")
    return table



# FITS binary-table formats read as raw records (the FITS standard, table 18); others go through astropy
_RAW_FORMATS = {"L": "i1", "B": "u1", "I": ">i2", "J": ">i4", "K": ">i8", "E": ">f4", "D": ">f8", "C": ">c8", "M": ">c16"}
_TFORM = re.compile(r"^\s*(\d*)([A-Z])(.*)$")


@dataclass(frozen=True)
class TableLayout:
    """Where one binary table of a FITS file lies and how its rows are laid out: ``dtype`` is None
    where raw records would not read as astropy reads them (scaled, null-flagged, multi-dimensional
    or variable-length columns)."""

    path: Path
    rows: int
    offset: int  # bytes from the start of the file to the table's data
    dtype: np.dtype | None
    widths: dict  # text columns: characters

    def records(self) -> np.ndarray:
        with open(self.path, "rb") as stream:
            stream.seek(self.offset)
            data = stream.read(self.rows * self.dtype.itemsize)
        return np.frombuffer(data, self.dtype, count=self.rows).copy()


def _card_value(text: str):
    text = text.strip()
    if text.startswith("'"):
        end = 1
        while True:  # a quote is doubled inside a string
            end = text.index("'", end)
            if text[end:end + 2] != "''":
                return text[1:end].replace("''", "'").rstrip()
            end += 2
    return text.split("/", 1)[0].strip()


def table_layout(path: Path, extname: str) -> TableLayout:
    """The layout of the binary table ``extname`` of the FITS file ``path``, read from the headers
    (2880-byte blocks of 80-character cards; each data unit's size from BITPIX, NAXISn, PCOUNT and
    GCOUNT, as the FITS standard defines it)."""
    with open(path, "rb") as stream:
        offset = 0
        while True:
            cards, ended = {}, False
            while not ended:
                block = stream.read(BLOCK)
                if len(block) < BLOCK:
                    raise ValueError(f"{path}: no binary table {extname!r}")
                offset += BLOCK
                for i in range(0, BLOCK, 80):
                    card = block[i:i + 80].decode("ascii", "replace")
                    if card[:8].rstrip() == "END":
                        ended = True
                        break
                    if card[8:10] == "= ":
                        cards[card[:8].rstrip()] = _card_value(card[10:])
            naxis = int(cards.get("NAXIS", 0))
            elements = math.prod(int(cards[f"NAXIS{k}"]) for k in range(1, naxis + 1)) if naxis else 0
            size = abs(int(cards["BITPIX"])) // 8 * int(cards.get("GCOUNT", 1)) * (int(cards.get("PCOUNT", 0)) + elements)
            if cards.get("XTENSION") == "BINTABLE" and cards.get("EXTNAME") == extname:
                return _layout(path, cards, offset)
            offset += size + (-size) % BLOCK
            stream.seek(offset)


def _layout(path: Path, cards: dict, offset: int) -> TableLayout:
    fields, widths = [], {}
    raw = not any(key.startswith(("TSCAL", "TZERO", "TNULL", "TDIM")) for key in cards)
    for k in range(1, int(cards["TFIELDS"]) + 1):
        name, match = cards[f"TTYPE{k}"], _TFORM.match(cards[f"TFORM{k}"])
        repeat, code = int(match.group(1) or 1), match.group(2)
        if code == "A":
            widths[name] = repeat
            fields.append((name, f"S{repeat}"))
        elif code in _RAW_FORMATS and not match.group(3):
            fields.append((name, _RAW_FORMATS[code], (repeat,)) if repeat > 1 else (name, _RAW_FORMATS[code]))
        else:
            raw = False
    dtype = np.dtype(fields) if raw else None
    if dtype is not None and dtype.itemsize != int(cards["NAXIS1"]):
        dtype = None
    return TableLayout(path=Path(path), rows=int(cards["NAXIS2"]), offset=offset, dtype=dtype, widths=widths)


def _as_astropy_reads(raw: np.ndarray, template: Table) -> Table:
    """A Table of raw FITS records converted as astropy's FITS reader converts them (logicals to
    booleans, text stripped of trailing blanks and decoded, native byte order, NaNs and empty
    strings masked), with the units, descriptions and formats of ``template`` (a shard's table read
    by astropy)."""
    columns = []
    for name in template.colnames:
        like, values, mask = template[name], raw[name], None
        kind = like.dtype.kind
        if kind == "b":
            values = values == ord("T")  # FITS logicals are stored as the bytes 'T' and 'F'
        elif kind in "US":
            values = np.char.rstrip(values)
            mask = values == b""
            if kind == "U":
                values = np.char.decode(values, "ascii")
        else:
            values = values.astype(like.dtype.newbyteorder("="))
            if kind in "fc":
                mask = np.isnan(values)
        common = dict(name=name, unit=like.unit, description=like.description, format=like.format, meta=like.meta)
        if mask is not None and mask.any():
            columns.append(MaskedColumn(values, mask=mask, fill_value=np.nan if kind in "fc" else "", **common))
        else:
            columns.append(Column(values, **common))
    return Table(columns, meta=template.meta)


def _read_chunk(layouts: Sequence[TableLayout], hdu: str, template: Table, widths: dict) -> list:
    """The tables of one chunk: one Table from the raw records of all (text as wide as ``widths``),
    or one Table per shard through astropy where a layout cannot be read raw."""
    if any(layout.dtype is None for layout in layouts):
        return [read_table(layout.path, hdu) for layout in layouts]
    records = [layout.records() for layout in layouts]
    dtype = [(name, f"S{max(widths[name], 1)}" if name in widths else records[0].dtype[name])
             for name in records[0].dtype.names]
    return [_as_astropy_reads(np.concatenate([record.astype(dtype) for record in records]), template)]


def write_catalogue(sources: Sequence[Path], hdu: str, folder: Path, stem: str, keep: Sequence[str] = ()) -> dict:
    """Write ``stem.fits`` and ``stem.ecsv`` from table ``hdu`` of each FITS file in ``sources`` (in
    that order); return the columns named in ``keep``, concatenated (for summaries)."""
    folder = Path(folder)
    layouts = [table_layout(path, hdu) for path in sources]  # pass 1, headers only
    widths: dict = {}
    for layout in layouts:
        for name, width in layout.widths.items():
            widths[name] = max(widths.get(name, 0), width)
    n_rows = sum(layout.rows for layout in layouts)
    template = read_table(sources[0], hdu) if sources else None
    kept = {name: [] for name in keep}
    with atomic_path(folder / f"{stem}.fits") as fits_tmp, atomic_path(folder / f"{stem}.ecsv") as ecsv_tmp:
        with open(fits_tmp, "wb") as fits_out, open(ecsv_tmp, "w", encoding="utf-8") as ecsv_out:
            fits_out.write(fits.PrimaryHDU().header.tostring().encode("ascii"))
            written, start, row_bytes = 0, 0, 0
            while start < len(layouts):  # pass 2: a chunk of whole shards at a time
                stop, rows = start, 0
                while stop < len(layouts) and (rows < CHUNK_ROWS or stop == start):
                    rows += layouts[stop].rows
                    stop += 1
                parts = [_with_widths(part, widths) for part in _read_chunk(layouts[start:stop], hdu, template, widths)]
                chunk = parts[0] if len(parts) == 1 else vstack(parts, join_type="exact", metadata_conflicts="silent")
                for name in keep:  # a copy: a view would keep the whole chunk's table alive
                    kept[name].append(np.array(chunk[name], copy=True))
                row_bytes = _write_chunk(chunk, first=written == 0, n_rows=n_rows, fits_out=fits_out, ecsv_out=ecsv_out)
                written, start = written + 1, stop
            fits_out.write(b"\0" * ((-row_bytes * n_rows) % BLOCK))
    return {name: (np.concatenate(parts) if parts else np.empty(0)) for name, parts in kept.items()}


def _write_chunk(chunk: Table, first: bool, n_rows: int, fits_out, ecsv_out) -> int:
    """Append ``chunk`` to both files (the first chunk with the headers, the FITS one for ``n_rows``
    rows in all); return the FITS row size in bytes."""
    text = io.StringIO()
    chunk.write(text, format="ascii.ecsv")
    lines = text.getvalue().splitlines(keepends=True)
    if first:
        ecsv_out.writelines(lines)  # header, column names and the first rows
    else:
        body = [line for line in lines if not line.startswith("#")]
        ecsv_out.writelines(body[1:])  # drop the column-name line
    hdu = table_hdu(chunk, None)
    if first:
        header = hdu.header.copy()
        header["NAXIS2"] = n_rows
        fits_out.write(header.tostring().encode("ascii"))
    row_bytes = int(hdu.header["NAXIS1"])
    buffer = io.BytesIO()
    hdu.writeto(buffer)
    raw = buffer.getvalue()
    start = len(fits.PrimaryHDU().header.tostring()) + len(hdu.header.tostring())
    fits_out.write(raw[start:start + row_bytes * len(chunk)])
    return row_bytes
