"""Shard files: many systems in one FITS file, the form for training sets.

``shards/shard_NNNNN.fits`` holds, for the systems ``FIRSTID .. FIRSTID + NSYSTEM - 1`` in order:

===============  =====================================  ==============================================================
EXTNAME          shape (numpy order)                   content
===============  =====================================  ==============================================================
PRIMARY          --                                    run name, shard index, first id, bands, pixel scale
IMAGES           (n_systems, n_bands, ny, nx) float32  observed images, ADU, sky-subtracted
SOURCE           (n_systems, n_bands, ny, nx) float32  noiseless lensed source (if output.noiseless)
LENS             (n_systems, n_bands, ny, nx) float32  noiseless lens light (if output.noiseless)
NEIGHBOURS       (n_systems, n_bands, ny, nx) float32  noiseless unlensed neighbours ([neighbours], output.noiseless)
VARIANCE         (n_systems, n_bands, ny, nx) float32  expected noise variance per pixel, ADU^2 (output.variance)
MASK             (n_systems, n_bands, ny, nx) uint8    1 where the lensed source exceeds MASKTHR x sigma
PSF              (n_systems, n_bands, 25, 25) float32  effective PSF per system and band, unit sum
REFERENCE        (n_systems, n_bands, ny, nx) float32  noiseless static scene, no point source ([survey.cadence])
EPOCH_IMAGES     (n_systems, n_epochs, ny, nx) float32 observed image at each epoch ([survey.cadence])
EPOCH_DIFFERENCE (n_systems, n_epochs, ny, nx) float32 EPOCH_IMAGES less the static scene at each epoch's PSF
EPOCH_POINTS     (n_systems, n_epochs, ny, nx) float32 noiseless point-source images at each epoch (output.noiseless)
TRUTH            table, one row per system             the truth catalogue's rows for this shard
SUBHALOS         table, one row per subhalo            subhalos of this shard's lenses (by system_id)
IMAGE_TRUTH      table, one row per image              images of the source centre (by system_id)
LINE_OF_SIGHT    table, one row per galaxy             line-of-sight galaxies (by system_id)
NEIGHBOUR_TRUTH  table, one row per neighbour          a crowded cutout's galaxies and stars ([neighbours])
EPOCHS           table, one row per epoch              time, band, seeing, sky, zero point, depth ([survey.cadence])
LIGHT_CURVES     table, one row per image and epoch    each image's true flux and magnitude ([survey.cadence])
===============  =====================================  ==============================================================

Each system's WCS is the per-system cutout's (:func:`simlens.output.cutout_wcs` with the truth row's
ra, dec and the PIXSCALE keyword); each band's photometric zero point is the truth's
``magzero_<band>`` column.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
from astropy.io import fits
from astropy.table import Table

from .columns import read_table, table_hdu

from .atomic import atomic_path

__all__ = ["write_shard", "read_shard", "PLANES"]

PLANES = ("IMAGES", "SOURCE", "LENS", "NEIGHBOURS", "VARIANCE", "MASK", "PSF", "REFERENCE", "EPOCH_IMAGES",
          "EPOCH_DIFFERENCE", "EPOCH_POINTS")


def write_shard(path: Path, cubes: dict, truth: Table, header: dict, extra_tables: dict | None = None) -> None:
    """Write one shard file atomically.  ``cubes`` maps EXTNAMEs of :data:`PLANES` to arrays."""
    primary = fits.PrimaryHDU()
    for key, value in header.items():
        primary.header[key] = value
    hdus = [primary]
    for name in PLANES:
        if name in cubes:
            hdus.append(fits.ImageHDU(data=cubes[name], name=name))
    hdus.append(table_hdu(truth, "TRUTH"))
    for name, table in (extra_tables or {}).items():
        hdus.append(table_hdu(table, name))
    with atomic_path(Path(path)) as tmp:
        fits.HDUList(hdus).writeto(tmp)


def read_shard(path: Path, planes=("IMAGES",)) -> tuple[dict, Table]:
    """Read the requested planes (arrays) and the truth rows of one shard file."""
    with fits.open(path, memmap=True) as hdul:
        arrays = {name: np.array(hdul[name].data) for name in planes}
        truth = read_table(hdul, "TRUTH")
    return arrays, truth
