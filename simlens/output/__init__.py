"""Writers for the files of a run: shard files, per-system FITS cutouts, truth rows and the
streamed catalogues (the manifest itself belongs to :mod:`simlens.run_folder`).

To add an output format, add a module here with a writer taking :class:`simlens.render.RenderedSystem`
objects (or arrays and truth rows) and a path, and call it from :func:`simlens.shard.render_shard`.
"""

from .catalogue import write_catalogue
from .cutout_fits import cutout_wcs, read_cutout, write_cutout
from .shard_fits import read_shard, write_shard
from .truth import truth_row, truth_table

__all__ = ["cutout_wcs", "write_cutout", "read_cutout", "write_shard", "read_shard", "truth_row",
           "truth_table", "write_catalogue"]
