"""Pictures of a run: contact sheets of colour composites and plots of the population.

A contact sheet shows each selected system as up to three colour composites of three bands
(reddest as R to bluest as B; fewer bands are repeated), side by side, with its key truth under
them:

- ``observed``: the cutout as the survey sees it;
- ``subtracted``: the cutout minus the noiseless lens light (the arcs as a finder must find them);
- ``source``: the noiseless lensed source alone.

Every band is divided by its own pixel noise sigma (measured on the cutout's noise: the image less
its noiseless planes), so the noise looks alike in all three channels and a panel's brightness reads
as signal-to-noise.  The subtracted panel is smoothed by a Gaussian of the PSF's FWHM (the matched
filter of an unresolved feature: most pixels of an arc's 1-sigma mask are too faint to stand out
one by one; the README gives the measured contrast).  Each panel is the asinh stretch of Lupton
et al. (2004), via ``astropy.visualization.make_lupton_rgb``, its linear range a fraction of the panel's
99.5th-percentile brightness (in crowded cutouts, of the pixels the neighbours leave clear), its
softening and black level set per panel (``PANEL_STRETCH``).
The segmentation mask (the reference band's MASK plane) is drawn as a contour on the subtracted and
source panels.  Systems are chosen by simple truth cuts (``"arc_snr_r < 10"``; no code is
evaluated), optionally restricted to the lenses a finder missed, and sorted by a truth column.
"""

from __future__ import annotations

import json
import math
import operator
import re
from pathlib import Path
from typing import Sequence

import numpy as np
from astropy.table import Table

from .errors import SimlensError
from .runs.loader import shard_files

__all__ = ["parse_cut", "select_systems", "contact_sheets", "panel_images", "population_plots", "PANELS",
           "PANEL_STRETCH"]

PANELS = ("observed", "subtracted", "source")
PANEL_TITLES = {"observed": "observed", "subtracted": "lens subtracted, smoothed", "source": "lensed source (noiseless)"}
# Per panel: the asinh stretch's linear range as a fraction of the panel's 99.5th-percentile
# brightness, its softening Q, and the black level (in noise sigma).
PANEL_STRETCH = {"observed": (0.5, 8.0, -1.0), "subtracted": (1.0, 3.0, -1.0), "source": (0.2, 8.0, 0.0)}

# In crowded cutouts a panel's stretch comes from the pixels where the neighbours' noiseless light is
# below this many noise sigma (bright neighbours saturate; the arcs set the range).
NEIGHBOUR_CLEAR_SIGMA = 0.5

_OPERATORS = {"<=": operator.le, ">=": operator.ge, "==": operator.eq, "!=": operator.ne,
              "<": operator.lt, ">": operator.gt}
_CUT = re.compile(r"^\s*([A-Za-z_][A-Za-z0-9_]*)\s*(<=|>=|==|!=|<|>)\s*(\S+)\s*$")


def parse_cut(text: str):
    """``"column op value"`` -> (column, function, value); op one of < <= > >= == !=."""
    match = _CUT.match(text)
    if not match:
        raise SimlensError(f"cut {text!r}: expected 'COLUMN OP VALUE' with OP one of <, <=, >, >=, ==, !=")
    column, op, value = match.groups()
    try:
        parsed = float(value)
    except ValueError:
        parsed = {"true": True, "false": False}.get(value.lower(), value.strip("'\""))
    return column, _OPERATORS[op], parsed


def select_systems(truth: Table, cuts: Sequence[str] = (), missed: Table | None = None, threshold: float | None = None,
                   sort: str | None = None, descending: bool = False) -> Table:
    """Rows of ``truth`` passing every cut; with ``missed`` (a scores table), only the lenses whose
    score is below ``threshold``."""
    keep = np.ones(len(truth), dtype=bool)
    for text in cuts:
        column, op, value = parse_cut(text)
        if column not in truth.colnames:
            raise SimlensError(f"cut {text!r}: no truth column {column!r}")
        keep &= np.asarray(op(np.asarray(truth[column]), value), dtype=bool)
    if missed is not None:
        from .scoring.cutouts import lens_labels

        scores = dict(zip(np.asarray(missed["system_id"]).tolist(), np.asarray(missed["score"]).tolist()))
        score = np.array([scores.get(int(i), -np.inf) for i in truth["system_id"]])
        keep &= lens_labels(truth) & (score < threshold)
    chosen = truth[keep]
    if sort is not None:
        if sort not in truth.colnames:
            raise SimlensError(f"sort: no truth column {sort!r}")
        chosen = chosen[np.argsort(np.asarray(chosen[sort]), kind="stable")[::-1 if descending else 1]]
    return chosen


def _planes_of(run_dir: Path, ids: np.ndarray) -> dict:
    """``system_id -> {plane: (bands, ny, nx)}`` of the IMAGES, LENS, SOURCE, NEIGHBOURS and MASK planes the
    shards hold (the noiseless ones only if the run wrote them), and ``"pixel_scale"`` (arcsec)."""
    from astropy.io import fits

    wanted, out = set(int(i) for i in ids), {}
    for path in shard_files(run_dir):
        with fits.open(path, memmap=True) as hdul:
            first, n = int(hdul[0].header["FIRSTID"]), int(hdul[0].header["NSYSTEM"])
            names = [name for name in ("IMAGES", "LENS", "SOURCE", "NEIGHBOURS", "MASK") if name in hdul]
            for i in sorted(wanted & set(range(first, first + n))):
                out[i] = {name: np.array(hdul[name].data[i - first], dtype=float) for name in names}
                out[i]["pixel_scale"] = float(hdul[0].header["PIXSCALE"])
    return out


def noise_sigma(planes: dict, smooth_pixels: float = 0.0) -> np.ndarray:
    """Per-band pixel noise sigma of one cutout (after smoothing by a Gaussian of ``smooth_pixels``):
    the standard deviation of the image less its noiseless planes (the neighbours' too), or (without
    them) 1.4826 times the median absolute deviation of the image."""
    if "LENS" in planes and "SOURCE" in planes:
        noise = _smoothed(planes["IMAGES"] - planes["LENS"] - planes["SOURCE"] - planes.get("NEIGHBOURS", 0.0),
                          smooth_pixels)
        return np.maximum(noise.std(axis=(1, 2)), 1e-30)
    image = _smoothed(planes["IMAGES"], smooth_pixels)
    median = np.median(image, axis=(1, 2), keepdims=True)
    return np.maximum(1.4826 * np.median(np.abs(image - median), axis=(1, 2)), 1e-30)


def _smoothed(cube: np.ndarray, sigma_pixels: float) -> np.ndarray:
    from scipy import ndimage

    return np.array([ndimage.gaussian_filter(band, sigma_pixels, mode="nearest") for band in cube]) if sigma_pixels > 0 else cube


def _check_panels(panels: Sequence[str]) -> None:
    for panel in panels:
        if panel not in PANELS:
            raise SimlensError(f"unknown gallery panel {panel!r}; choose from {', '.join(PANELS)}")


def panel_images(planes: dict, index: Sequence[int], panels: Sequence[str] = PANELS, smooth_pixels: float = 0.0,
                 stretch_scale: float = 1.0, q: float | None = None) -> dict:
    """``panel -> (ny, nx, 3)`` RGB image (floats in [0, 1]) of one cutout's ``planes`` (see
    :func:`_planes_of`), with the bands ``index`` as R, G, B (the module docstring says how);
    ``smooth_pixels`` is the Gaussian sigma by which the subtracted panel is smoothed."""
    from astropy.visualization import make_lupton_rgb

    _check_panels(panels)
    bands = list(index)
    out = {}
    for panel in panels:
        smooth = smooth_pixels if panel == "subtracted" else 0.0
        if panel == "source":  # noiseless: in units of the cutout's noise, but no noise to measure
            signal = planes["SOURCE"]
        else:
            signal = _smoothed(planes["IMAGES"] - (planes["LENS"] if panel == "subtracted" else 0.0), smooth)
        sigma = noise_sigma(planes, smooth)[bands, None, None]
        channels = signal[bands] / sigma
        fraction, softening, minimum = PANEL_STRETCH[panel]
        brightness = channels.mean(axis=0)
        if "NEIGHBOURS" in planes and panel != "source":  # the stretch from the pixels neighbours leave
            clear = (_smoothed(planes["NEIGHBOURS"], smooth)[bands] / sigma).max(axis=0) < NEIGHBOUR_CLEAR_SIGMA
            brightness = brightness[clear] if clear.mean() > 0.2 else brightness
        top = float(np.percentile(brightness, 99.5))
        linear = max(stretch_scale * fraction * top, 1e-12 if panel == "source" else 1.0)
        with np.errstate(invalid="ignore", divide="ignore"):  # (astropy divides by zero where a pixel is black)
            rgb = make_lupton_rgb(*channels, minimum=minimum, stretch=linear, Q=softening if q is None else q)
        out[panel] = rgb / 255.0
    return out


def _number(row, column: str) -> float:
    value = row[column] if column in row.colnames else np.nan
    return float(np.ma.filled(value, np.nan)) if np.ma.is_masked(value) else float(value)


def _caption(row, band: str) -> str:
    first = [f"#{row['system_id']}", f"θE {row['einstein_radius']:.2f}\""]
    snr = _number(row, f"arc_snr_{band}")
    if np.isfinite(snr):
        first.append(f"S/N {snr:.0f}")
    second = [f"z {row['z_lens']:.2f}/{row['z_source']:.2f}"]
    mag = _number(row, f"source_mag_{band}")
    if np.isfinite(mag):
        second.append(f"{band} {mag:.1f}")
    if "system_class" in row.colnames and str(row["system_class"]) != "lens":
        second.append(str(row["system_class"]))
    return "  ".join(first) + "\n" + "  ".join(second)


def contact_sheets(run_dir: str | Path, rows: Table, name: str = "gallery", per_page: int = 24,
                   columns: int = 4, bands: Sequence[str] | None = None, panels: Sequence[str] | None = None,
                   smooth: float | None = None, stretch_scale: float = 1.0, q: float | None = None) -> list[str]:
    """PNG contact sheets of ``rows`` (truth rows of the run) in ``run_dir/gallery/``: ``columns``
    systems a row, each as its ``panels`` (default: all the run's planes allow).  ``smooth`` is the
    FWHM (arcsec) of the Gaussian that smooths the subtracted panel (default: the system's PSF FWHM
    in the reference band; 0: none); ``stretch_scale`` multiplies every panel's linear range and
    ``q`` replaces its softening (see PANEL_STRETCH)."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    run_dir = Path(run_dir)
    manifest = json.loads((run_dir / "manifest.json").read_text(encoding="utf-8"))
    run_bands, reference = manifest["bands"], manifest["reference_band"]
    bands = list(bands) if bands else (run_bands[-3:][::-1] if len(run_bands) >= 3 else run_bands[::-1])
    for b in bands:
        if b not in run_bands:
            raise SimlensError(f"band {b!r} is not in this run ({', '.join(run_bands)})")
    while len(bands) < 3:
        bands.append(bands[-1])
    if len(rows) == 0:
        raise SimlensError("no system passes the cuts; nothing to draw")
    _check_panels(panels or ())
    planes = _planes_of(run_dir, np.asarray(rows["system_id"]))
    held = set.intersection(*(set(p) for p in planes.values()))
    possible = [p for p in PANELS if p == "observed" or {"LENS", "SOURCE"} <= held]
    if panels and set(panels) - set(possible):
        raise SimlensError(f"panels {', '.join(sorted(set(panels) - set(possible)))} need the noiseless LENS and "
                           "SOURCE planes, which this run did not write (recipe [output] noiseless = true)")
    panels = list(panels or possible)
    index = [run_bands.index(b) for b in bands[:3]]
    reference_index = run_bands.index(reference)
    out = run_dir / "gallery"
    out.mkdir(parents=True, exist_ok=True)
    files, width = [], len(panels)
    for page in range(math.ceil(len(rows) / per_page)):
        chunk = rows[page * per_page:(page + 1) * per_page]
        n_rows = math.ceil(len(chunk) / columns)
        fig, axes = plt.subplots(n_rows, columns * width, figsize=(1.7 * columns * width + 0.1 * columns, 2.2 * n_rows + 0.5),
                                 squeeze=False)
        for ax in axes.flat:
            ax.axis("off")
        for k, row in enumerate(chunk):
            system = planes[int(row["system_id"])]
            fwhm = _number(row, f"psf_fwhm_{reference}") if smooth is None else smooth
            sigma_pixels = fwhm / (2.0 * math.sqrt(2.0 * math.log(2.0))) / system["pixel_scale"] if fwhm > 0 else 0.0
            images = panel_images(system, index, panels, smooth_pixels=sigma_pixels, stretch_scale=stretch_scale, q=q)
            row_axes = axes[k // columns, (k % columns) * width:(k % columns + 1) * width]
            for ax, panel in zip(row_axes, panels):
                ax.imshow(images[panel], origin="lower")
                if panel != "observed" and "MASK" in system and system["MASK"][reference_index].any():
                    ax.contour(system["MASK"][reference_index], levels=[0.5], colors="#00e5ff", linewidths=0.5)
                if k < columns:
                    ax.set_title(PANEL_TITLES[panel], fontsize=6, pad=2)
            row_axes[width // 2].text(0.5, -0.03, _caption(row, reference), transform=row_axes[width // 2].transAxes,
                                      ha="center", va="top", fontsize=6)
        smoothing = "the PSF" if smooth is None else (f'{smooth:g}"' if smooth > 0 else "nothing")
        fig.suptitle(f"{manifest.get('simlens_run', '')}: {', '.join(bands[:3])} as R, G, B, each band in units of its "
                     f"noise sigma, asinh stretches; subtracted panels smoothed by {smoothing}; contour: the "
                     f"{reference} mask (page {page + 1})", fontsize=7)
        fig.subplots_adjust(left=0.005, right=0.995, top=1 - 0.45 / fig.get_figheight(), bottom=0.04,
                            wspace=0.04, hspace=0.4)
        path = out / f"{name}_{page + 1:03d}.png"
        fig.savefig(path, dpi=110)
        plt.close(fig)
        files.append(str(path))
    return files


def population_plots(run_dir: str | Path) -> list[str]:
    """Histograms of the run's Einstein radii, redshifts, magnitudes and arc S/N (PNG)."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    run_dir = Path(run_dir)
    truth = Table.read(run_dir / "truth.fits")
    manifest = json.loads((run_dir / "manifest.json").read_text(encoding="utf-8"))
    ref = manifest["reference_band"]
    panels = [("einstein_radius", "Einstein radius [arcsec]", False), ("z_lens", "lens redshift", False),
              ("z_source", "source redshift", False), (f"lens_mag_{ref}", f"lens {ref} [AB mag]", False),
              (f"source_mag_{ref}", f"unlensed source {ref} [AB mag]", False),
              (f"arc_snr_{ref}", f"arc S/N ({ref})", True), ("magnification", "magnification", True),
              (f"psf_fwhm_{ref}", f"PSF FWHM ({ref}) [arcsec]", False)]
    panels = [p for p in panels if p[0] in truth.colnames]
    fig, axes = plt.subplots(2, math.ceil(len(panels) / 2), figsize=(3.2 * math.ceil(len(panels) / 2), 5.6))
    for ax in axes.flat:
        ax.axis("off")
    for ax, (column, label, log) in zip(axes.flat, panels):
        ax.axis("on")
        values = np.asarray(truth[column], dtype=float)
        values = values[np.isfinite(values) & ((values > 0) if log else True)]
        if values.size == 0:
            continue
        bins = np.geomspace(values.min(), values.max(), 25) if log and values.min() > 0 else 25
        ax.hist(values, bins=bins, histtype="stepfilled", alpha=0.8)
        if log:
            ax.set_xscale("log")
        ax.set_xlabel(label, fontsize=8)
        ax.tick_params(labelsize=7)
    fig.suptitle(f"{manifest.get('simlens_run', '')}: {len(truth)} systems", fontsize=9)
    fig.tight_layout()
    out = run_dir / "gallery"
    out.mkdir(parents=True, exist_ok=True)
    path = out / "population.png"
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return [str(path)]
