"""Writers for the files of a run: per-system FITS cutouts, the truth catalogue, the manifest.

To add an output format, add a module here with a writer taking :class:`simlens.render.RenderedSystem`
objects (or truth rows) and a path, and call it from :mod:`simlens.pipeline`.
"""

from .cutout_fits import cutout_wcs, read_cutout, write_cutout
from .manifest import write_manifest
from .truth import truth_row, write_truth

__all__ = ["cutout_wcs", "write_cutout", "read_cutout", "truth_row", "write_truth", "write_manifest"]
