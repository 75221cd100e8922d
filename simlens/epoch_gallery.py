"""Pictures of a run with epochs: for each system, a strip of its epochs and its images' light curves.

Each strip panel is one epoch's ideal difference image (EPOCH_DIFFERENCE: the observed image less
the static scene seen with that epoch's PSF, what a perfect PSF-matched subtraction leaves), divided
by that visit's sky noise, so that the panels read as signal-to-noise: grey from -3 sigma to a
common upper level (the brightest panel's 99.8th percentile, at least 10 sigma), asinh-stretched.
The epochs shown are spread evenly over those in which the point source has at least 5 % of its
brightest light (all epochs if it never has); the truth images are marked on the first panel. Under
the strip, each image's true magnitude at every epoch (``light_curves.ecsv``), one line per image,
one colour per band, each visit's 5-sigma depth as a small triangle of its band's colour, the
strip's epochs in grey.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
from astropy.table import Table

from .errors import SimlensError
from .runs.loader import run_epochs, shard_files

__all__ = ["epoch_strips", "strip_epochs"]

BAND_COLOURS = ("#3b6fd4", "#2f9e44", "#d9480f", "#862e9c", "#c92a2a", "#495057")
LINE_STYLES = ("-", "--", ":", "-.")


def strip_epochs(point_flux: np.ndarray, n: int) -> np.ndarray:
    """Indices of ``n`` epochs spread evenly over those whose point-source flux (one value per
    epoch) is at least 5 % of the brightest (all epochs when there is no point source)."""
    lit = np.flatnonzero(point_flux >= 0.05 * point_flux.max()) if point_flux.max() > 0 else np.arange(point_flux.size)
    first, last = int(lit[0]), int(lit[-1])
    return np.unique(np.round(np.linspace(first, last, min(n, last - first + 1))).astype(int))


def _system_epochs(run_dir: Path, ids) -> dict:
    from astropy.io import fits

    wanted, out = set(int(i) for i in ids), {}
    for path in shard_files(run_dir):
        with fits.open(path, memmap=True) as hdul:
            if "EPOCH_DIFFERENCE" not in hdul:
                raise SimlensError(f"{run_dir}: its shards hold no EPOCH_DIFFERENCE; epoch strips need a run whose "
                                   f"recipe has [survey.cadence]")
            first, n = int(hdul[0].header["FIRSTID"]), int(hdul[0].header["NSYSTEM"])
            for i in sorted(wanted & set(range(first, first + n))):
                out[i] = (np.array(hdul["EPOCH_DIFFERENCE"].data[i - first], float), float(hdul[0].header["PIXSCALE"]))
    return out


def epoch_strips(run_dir: str | Path, rows: Table, name: str = "gallery", per_page: int = 4,
                 n_epochs: int = 8) -> list[str]:
    """PNG pages in ``run_dir/gallery/`` (``<name>_epochs_NNN.png``): ``per_page`` systems of
    ``rows`` (truth rows), each as a strip of ``n_epochs`` difference images over its light curves."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    run_dir = Path(run_dir)
    epochs = run_epochs(run_dir)
    curves = Table.read(run_dir / "light_curves.ecsv")
    images = Table.read(run_dir / "images.ecsv")
    if len(rows) == 0:
        raise SimlensError("no system passes the cuts; nothing to draw")
    bands = list(dict.fromkeys(epochs["band"]))
    colour = {b: BAND_COLOURS[k % len(BAND_COLOURS)] for k, b in enumerate(bands)}
    data = _system_epochs(run_dir, rows["system_id"])
    out = run_dir / "gallery"
    out.mkdir(parents=True, exist_ok=True)
    files = []
    for page in range(math.ceil(len(rows) / per_page)):
        chunk = rows[page * per_page:(page + 1) * per_page]
        fig = plt.figure(figsize=(1.45 * n_epochs, 3.3 * len(chunk) + 0.4))
        grid = fig.add_gridspec(2 * len(chunk), n_epochs, height_ratios=[1.0, 1.05] * len(chunk),
                                hspace=0.55, wspace=0.05, left=0.06, right=0.99, top=1 - 0.75 / fig.get_figheight(),
                                bottom=0.05)
        for s, row in enumerate(chunk):
            system_id = int(row["system_id"])
            stack, scale = data[system_id]
            mine = curves[curves["system_id"] == system_id]
            flux = np.bincount(np.asarray(mine["epoch"], int), weights=np.asarray(mine["flux"], float),
                               minlength=len(epochs))
            shown = strip_epochs(flux, n_epochs)
            sigma = np.asarray(epochs["sky_sigma"], float)
            difference = [stack[e] / sigma[e] for e in shown]
            top = max(10.0, max(float(np.percentile(d, 99.8)) for d in difference))
            for j, (e, image) in enumerate(zip(shown, difference)):
                ax = fig.add_subplot(grid[2 * s, j])
                stretched = np.arcsinh(np.clip(image, -3.0, top) / 3.0)
                ax.imshow(stretched, origin="lower", cmap="gray", vmin=np.arcsinh(-1.0), vmax=np.arcsinh(top / 3.0))
                ax.set_xticks([]), ax.set_yticks([])
                ax.set_title(f"{epochs['mjd'][e]:.1f} {epochs['band'][e]}", fontsize=6, pad=2)
                if j == 0:
                    centre = (stack.shape[-1] - 1) / 2.0
                    mine_images = images[images["system_id"] == system_id]
                    ax.scatter(centre + np.asarray(mine_images["x"]) / scale, centre + np.asarray(mine_images["y"]) / scale,
                               s=60, facecolors="none", edgecolors="#ffd43b", linewidths=0.6)
                    ax.set_ylabel(f"system {system_id}", fontsize=7)
            ax = fig.add_subplot(grid[2 * s + 1, :])
            for k in sorted(set(int(i) for i in mine["image"])):
                for band in bands:
                    sel = (mine["image"] == k) & (mine["band"] == band) & np.isfinite(mine["magnitude"])
                    if np.any(sel):
                        ax.plot(mine["mjd"][sel], mine["magnitude"][sel], LINE_STYLES[k % len(LINE_STYLES)],
                                color=colour[band], lw=0.9, label=f"image {k}, {band}")
            for e in shown:
                ax.axvline(float(epochs["mjd"][e]), color="#adb5bd", lw=0.5, zorder=0)
            finite = np.asarray(mine["magnitude"], float)[np.isfinite(mine["magnitude"])]
            depth = np.asarray(epochs["depth"], float)
            bright = float(finite.min()) if finite.size else float(depth.min())
            low = min(bright, float(depth.min())) - 0.3  # the images' brightest and the visits' depths
            high = min(max(bright + 2.0, float(depth.max()) + 1.0), low + 8.0)
            for band in bands:
                sel = np.asarray(epochs["band"]) == band
                ax.plot(np.asarray(epochs["mjd"])[sel], np.clip(depth[sel], low, high), "v", ms=2.5,
                        color=colour[band], alpha=0.45)
            ax.set_ylim(high, low)
            ax.set_ylabel("AB mag (true)", fontsize=7)
            ax.tick_params(labelsize=6)
            ax.set_xlim(float(epochs["mjd"][0]) - 2, float(epochs["mjd"][-1]) + 2)
            kind = str(row["transient"]) if "transient" in row.colnames and str(row["transient"]) else "no transient"
            ax.set_title(f"system {system_id}: {kind}, z_s = {float(row['z_source']):.2f}, theta_E = "
                         f"{float(row['einstein_radius']):.2f}\", delays up to {float(row['max_time_delay']):.0f} d",
                         fontsize=7, pad=2)
            if len(ax.lines):
                ax.legend(fontsize=5, ncol=min(6, len(ax.lines)), loc="best", frameon=False)
        fig.suptitle("epochs: observed minus the static scene at each visit's PSF (ideal difference images), in units of "
                     "each visit's sky noise (asinh, -3 sigma black); rings: the truth images\nbelow: each image's true "
                     "light curve (AB), each visit's 5-sigma depth (triangles), the strip's epochs (grey lines)", fontsize=7)
        path = out / f"{name}_epochs_{page + 1:03d}.png"
        fig.savefig(path, dpi=110)
        plt.close(fig)
        files.append(str(path))
    return files
