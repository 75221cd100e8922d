"""The run's catalogues (truth, subhalos) assembled from the shards with bounded memory.

Tables are streamed in chunks of whole shards (at least CHUNK_ROWS rows, or all that remain): the
ECSV file gets its header once and then each chunk's data lines; the FITS file gets one
binary-table header with the total row count (and string columns as wide as the widest shard's,
found from the shards' headers alone where the caller can) and then each chunk's fixed-size rows,
padded to the FITS block size.  Memory stays at about one chunk's table whatever the number of
systems (bench/bench_memory.py); the per-table costs of astropy are paid once per chunk, not once
per shard (the catalogues are written by the parent process, after the workers).
"""

from __future__ import annotations

import io
from pathlib import Path
from typing import Callable, Sequence

import numpy as np
from astropy.io import fits
from astropy.table import Table, vstack

from .columns import table_hdu
from .atomic import atomic_path

__all__ = ["write_catalogue"]

BLOCK = 2880
CHUNK_ROWS = 20_000


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
                    keep: Sequence[str] = (), describe_part: Callable[[int], tuple] | None = None) -> dict:
    """Write ``stem.fits`` and ``stem.ecsv`` from ``read_part(0 .. n_parts - 1)``; return the columns
    named in ``keep``, concatenated (for summaries).  ``describe_part(i)`` gives part i's row count
    and string widths (``{column: characters}``) without reading it (default: from ``read_part``)."""
    folder = Path(folder)
    describe_part = describe_part or (lambda i: _row_count_and_widths(read_part(i)))
    widths: dict = {}
    n_rows = 0
    for i in range(n_parts):  # pass 1: row count and string widths
        rows, part_widths = describe_part(i)
        n_rows += rows
        for name, width in part_widths.items():
            widths[name] = max(widths.get(name, 0), width)
    kept = {name: [] for name in keep}
    with atomic_path(folder / f"{stem}.fits") as fits_tmp, atomic_path(folder / f"{stem}.ecsv") as ecsv_tmp:
        with open(fits_tmp, "wb") as fits_out, open(ecsv_tmp, "w", encoding="utf-8") as ecsv_out:
            fits_out.write(fits.PrimaryHDU().header.tostring().encode("ascii"))
            written, pending, pending_rows, row_bytes = 0, [], 0, 0
            for i in range(n_parts):  # pass 2: stream, a chunk at a time
                part = _with_widths(read_part(i), widths)
                for name in keep:  # a copy: a view would keep the whole shard's table alive
                    kept[name].append(np.array(part[name], copy=True))
                pending.append(part)
                pending_rows += len(part)
                if pending_rows < CHUNK_ROWS and i < n_parts - 1:
                    continue
                chunk = pending[0] if len(pending) == 1 else vstack(pending, join_type="exact",
                                                                     metadata_conflicts="silent")
                row_bytes = _write_chunk(chunk, first=written == 0, n_rows=n_rows, fits_out=fits_out, ecsv_out=ecsv_out)
                written, pending, pending_rows = written + 1, [], 0
            data_size = row_bytes * n_rows
            fits_out.write(b"\0" * ((-data_size) % BLOCK))
    return {name: (np.concatenate(parts) if parts else np.empty(0)) for name, parts in kept.items()}


def _row_count_and_widths(table: Table) -> tuple[int, dict]:
    return len(table), _string_widths(table)


def header_row_count_and_widths(header: fits.Header) -> tuple[int, dict]:
    """A binary table's row count and string widths from its header alone (TFORMn ``wA``)."""
    widths = {}
    for k in range(1, int(header["TFIELDS"]) + 1):
        form = str(header[f"TFORM{k}"]).strip()
        if form.endswith("A"):
            widths[str(header[f"TTYPE{k}"])] = int(form[:-1] or 1)
    return int(header["NAXIS2"]), widths


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
