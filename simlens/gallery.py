"""Pictures of a run: contact sheets of colour composites and plots of the population.

Contact sheets show each selected system as a colour composite of three bands (the asinh stretch of
Lupton et al. 2004, via ``astropy.visualization.make_lupton_rgb``; fewer bands are repeated) with
its key truth under it.  Systems are chosen by simple truth cuts (``"arc_snr_r < 10"``; no code is
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

__all__ = ["parse_cut", "select_systems", "contact_sheets", "population_plots"]

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


def _images_of(run_dir: Path, ids: np.ndarray) -> dict:
    """``system_id -> (bands, ny, nx)`` observed images, read from the shards."""
    from astropy.io import fits

    wanted, out = set(int(i) for i in ids), {}
    for path in shard_files(run_dir):
        with fits.open(path, memmap=True) as hdul:
            first, n = int(hdul[0].header["FIRSTID"]), int(hdul[0].header["NSYSTEM"])
            for i in sorted(wanted & set(range(first, first + n))):
                out[i] = np.array(hdul["IMAGES"].data[i - first], dtype=float)
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


def contact_sheets(run_dir: str | Path, rows: Table, name: str = "gallery", per_page: int = 36,
                   columns: int = 6, bands: Sequence[str] | None = None, stretch: float = 0.5,
                   q: float = 8.0) -> list[str]:
    """PNG contact sheets of ``rows`` (truth rows of the run) in ``run_dir/gallery/``."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    from astropy.visualization import make_lupton_rgb

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
    images = _images_of(run_dir, np.asarray(rows["system_id"]))
    index = [run_bands.index(b) for b in bands[:3]]
    out = run_dir / "gallery"
    out.mkdir(parents=True, exist_ok=True)
    files = []
    for page in range(math.ceil(len(rows) / per_page)):
        chunk = rows[page * per_page:(page + 1) * per_page]
        n_rows = math.ceil(len(chunk) / columns)
        fig, axes = plt.subplots(n_rows, columns, figsize=(1.9 * columns, 2.35 * n_rows + 0.4), squeeze=False)
        for ax in axes.flat:
            ax.axis("off")
        for ax, row in zip(axes.flat, chunk):
            cube = images[int(row["system_id"])]
            # red, green, blue = the reddest to the bluest band; a common scale for all three
            scale = max(np.percentile(cube[index], 99.5), 1e-9)
            rgb = make_lupton_rgb(*(cube[k] / scale for k in index), stretch=stretch, Q=q)
            ax.imshow(rgb, origin="lower")
            ax.text(0.5, -0.03, _caption(row, reference), transform=ax.transAxes, ha="center", va="top",
                    fontsize=6)
        fig.suptitle(f"{manifest.get('simlens_run', '')}: {', '.join(bands[:3])} as R, G, B "
                     f"(page {page + 1})", fontsize=8)
        fig.subplots_adjust(left=0.01, right=0.99, top=1 - 0.35 / fig.get_figheight(), bottom=0.05,
                            wspace=0.05, hspace=0.35)
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
