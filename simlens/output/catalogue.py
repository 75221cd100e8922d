"""The run's catalogues (truth, subhalos) assembled from the shards with bounded memory.

Tables are streamed one shard at a time: the ECSV file gets its header once and then each shard's
data lines; the FITS file gets one binary-table header with the total row count (and string columns
as wide as the widest shard's) and then each shard's fixed-size rows, padded to the FITS block size.
Memory stays at about one shard's table whatever the number of systems (bench/bench_memory.py).
"""

from __future__ import annotations

import io
from pathlib import Path
from typing import Callable, Sequence

import numpy as np
from astropy.io import fits
from astropy.table import Table

from .columns import table_hdu
from .atomic import atomic_path

__all__ = ["write_catalogue"]

BLOCK = 2880


def _with_widths(table: Table, widths: dict) -> Table:
    table = table.copy(copy_data=False)
    for name, width in widths.items():
        table[name] = table[name].astype(f"U{max(width, 1)}")
    return table


def _string_widths(table: Table) -> dict:
    """Character widths of the text columns (unicode, or bytes as FITS tables are read back)."""
    widths = {}
    for name in table.colnames:
        dtype = table[name].dtype
        if dtype.kind == "U":
            widths[name] = int(dtype.itemsize // 4)
        elif dtype.kind == "S":
            widths[name] = int(dtype.itemsize)
    return widths


def write_catalogue(read_part: Callable[[int], Table], n_parts: int, folder: Path, stem: str,
                    keep: Sequence[str] = ()) -> dict:
    """Write ``stem.fits`` and ``stem.ecsv`` from ``read_part(0 .. n_parts - 1)``; return the columns
    named in ``keep``, concatenated (for summaries)."""
    folder = Path(folder)
    widths: dict = {}
    n_rows = 0
    for i in range(n_parts):  # pass 1: row count and string widths
        part = read_part(i)
        n_rows += len(part)
        for name, width in _string_widths(part).items():
            widths[name] = max(widths.get(name, 0), width)
    kept = {name: [] for name in keep}
    with atomic_path(folder / f"{stem}.fits") as fits_tmp, atomic_path(folder / f"{stem}.ecsv") as ecsv_tmp:
        with open(fits_tmp, "wb") as fits_out, open(ecsv_tmp, "w", encoding="utf-8") as ecsv_out:
            fits_out.write(fits.PrimaryHDU().header.tostring().encode("ascii"))
            row_bytes = None
            for i in range(n_parts):  # pass 2: stream
                part = _with_widths(read_part(i), widths)
                for name in keep:  # a copy: a view would keep the whole shard's table alive
                    kept[name].append(np.array(part[name], copy=True))
                text = io.StringIO()
                part.write(text, format="ascii.ecsv")
                lines = text.getvalue().splitlines(keepends=True)
                if i == 0:
                    ecsv_out.writelines(lines)  # header, column names and the first rows
                else:
                    body = [line for line in lines if not line.startswith("#")]
                    ecsv_out.writelines(body[1:])  # drop the column-name line
                hdu = table_hdu(part, None)
                if i == 0:
                    header = hdu.header.copy()
                    header["NAXIS2"] = n_rows
                    fits_out.write(header.tostring().encode("ascii"))
                    row_bytes = header["NAXIS1"]
                buffer = io.BytesIO()
                hdu.writeto(buffer)
                raw = buffer.getvalue()
                start = len(fits.PrimaryHDU().header.tostring()) + len(hdu.header.tostring())
                fits_out.write(raw[start:start + row_bytes * len(part)])
            data_size = (row_bytes or 0) * n_rows
            fits_out.write(b"\0" * ((-data_size) % BLOCK))
    return {name: (np.concatenate(parts) if parts else np.empty(0)) for name, parts in kept.items()}
