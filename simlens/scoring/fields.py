"""Scoring a finder that scans whole field images: detections matched to the lenses by position.

A finder run over the fields of a field run (simlens.field) reports *detections*: a table with
``field_id``, a position -- ``x_pixel, y_pixel`` (0-based pixels of the field image) or ``ra, dec``
(deg) -- and a ``score`` (higher = more lens-like).  Matching, field by field:

* a detection belongs to the nearest lens of its field within ``match_radius`` arcsec (angular
  separations by astropy's SkyCoord for sky positions); several detections of one lens count once,
  with the highest score; a detection near no lens, or near a non-lens (a negative), is a false
  positive;
* at a threshold, completeness is the share of the lenses (``is_lens``) with a matched detection at
  or above it -- overall and in bins of truth columns, with Wilson intervals, exactly as
  :mod:`simlens.scoring` does for cutouts -- and the false positives are counted per square degree
  of field area; purity is found lenses / (found lenses + false positives);
* the threshold is given, or chosen as the loosest with at most ``false_positives_per_deg2``;
  the curve of completeness against false positives per square degree is written with the tables.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Sequence

import numpy as np
from astropy.table import Table

from ..errors import SimlensError, clip
from ..user_tables import number_column, read_user_table, whole_number_column
from .cutouts import (completeness_2d, completeness_by, default_columns, describe_tables, lens_labels, plot_tables,
                      wilson_interval, write_report)

__all__ = ["read_detections", "match_detections", "FieldScoreReport", "score_fields", "MATCH_RADIUS"]

MATCH_RADIUS = 3.0  # arcsec (common practice: of the order of an Einstein radius plus the seeing)


def read_detections(path: str | Path) -> Table:
    """A finder's detections (CSV, ECSV or FITS): field_id, x_pixel and y_pixel or ra and dec, score."""
    table = read_user_table(path, "detections file", ("field_id", "score"))
    names = set(table.colnames)
    pixels, sky = {"x_pixel", "y_pixel"} <= names, {"ra", "dec"} <= names
    if not (pixels or sky):
        raise SimlensError(f"{path}: detections need a position; missing x_pixel and y_pixel (or ra and dec) "
                           f"(found: {clip(', '.join(table.colnames))})")
    columns = {"field_id": whole_number_column(path, table, "field_id"), "score": number_column(path, table, "score")}
    for name in (("x_pixel", "y_pixel") if pixels else ("ra", "dec")):
        columns[name] = number_column(path, table, name)
    return Table(columns)


def match_detections(truth: Table, detections: Table, match_radius: float, pixel_scale: float) -> np.ndarray:
    """For every detection, the truth row index of the lens it belongs to (-1: none)."""
    owner = np.full(len(detections), -1, dtype=np.int64)
    fields = np.asarray(truth["field_id"])
    by_pixels = "x_pixel" in detections.colnames
    for field_id in np.unique(np.asarray(detections["field_id"])):
        rows = np.flatnonzero(fields == field_id)
        mine = np.flatnonzero(np.asarray(detections["field_id"]) == field_id)
        if rows.size == 0:
            continue  # a field the run does not have: every detection there is false
        if by_pixels:
            dx = np.asarray(detections["x_pixel"])[mine, None] - np.asarray(truth["x_pixel"])[rows][None, :]
            dy = np.asarray(detections["y_pixel"])[mine, None] - np.asarray(truth["y_pixel"])[rows][None, :]
            separation = np.hypot(dx, dy) * pixel_scale
        else:
            from astropy.coordinates import SkyCoord

            found = SkyCoord(np.asarray(detections["ra"])[mine], np.asarray(detections["dec"])[mine], unit="deg")
            lenses = SkyCoord(np.asarray(truth["ra"])[rows], np.asarray(truth["dec"])[rows], unit="deg")
            separation = found[:, None].separation(lenses[None, :]).arcsec
        nearest = np.argmin(separation, axis=1)
        close = separation[np.arange(mine.size), nearest] <= match_radius
        owner[mine[close]] = rows[nearest[close]]
    return owner


@dataclass
class FieldScoreReport:
    threshold: float
    n_lenses: int
    n_detections: int
    completeness: float
    completeness_interval: tuple
    purity: float
    false_positives: int
    false_positives_per_deg2: float
    area_deg2: float
    match_radius: float
    tables: dict = field(default_factory=dict)
    files: list = field(default_factory=list)

    def describe(self) -> str:
        lo, hi = self.completeness_interval
        lines = [f"threshold {self.threshold:.6g}: completeness {self.completeness:.3f} [{lo:.3f}, {hi:.3f}] of "
                 f"{self.n_lenses} lenses; {self.false_positives} false positives "
                 f"({self.false_positives_per_deg2:.1f} per deg^2 over {self.area_deg2:.4f} deg^2); purity "
                 f"{self.purity:.3f}; {self.n_detections} detections matched within {self.match_radius:g} arcsec"]
        return "\n".join(lines + describe_tables(self.tables, self.files))


def _field_geometry(run_dir: Path, truth: Table) -> tuple[float, float, str]:
    """(area of all the run's fields in deg^2, pixel scale, reference band), from a field file's
    first image header and the manifest."""
    from astropy.io import fits

    manifest = json.loads((run_dir / "manifest.json").read_text(encoding="utf-8"))
    with fits.open(run_dir / str(truth["file"][0])) as hdul:
        header = hdul[1].header
        side = header["NAXIS1"] * header["PIXSCALE"] / 3600.0
        scale = float(header["PIXSCALE"])
    n_fields = len(set(np.asarray(truth["field_id"]).tolist()))
    return n_fields * side**2, scale, manifest.get("reference_band", "")


def score_fields(run_dir: str | Path, detections_path: str | Path, *, threshold: float | None = None,
                 false_positives_per_deg2: float | None = None, match_radius: float = MATCH_RADIUS,
                 columns: Sequence[str] | None = None, pair: Sequence[str] | None = None, n_bins: int = 6,
                 name: str = "finder", plots: bool = True) -> FieldScoreReport:
    """Score a whole-field finder's detections against a field run; tables to ``run_dir/scores/<name>/``."""
    run_dir = Path(run_dir)
    if not (run_dir / "truth.fits").is_file():
        raise SimlensError(f"{run_dir}: no truth.fits; is it a finished simlens field run?")
    truth = Table.read(run_dir / "truth.fits")
    if "field_id" not in truth.colnames:
        raise SimlensError(f"{run_dir}: not a field run (its truth has no field_id); score cutouts by system_id")
    if (threshold is None) == (false_positives_per_deg2 is None):
        raise SimlensError("give exactly one of a score threshold and a false-positive density (per deg^2)")
    if not match_radius > 0:
        raise SimlensError(f"match radius must be positive, got {match_radius}")
    detections = read_detections(detections_path)
    area, scale, reference = _field_geometry(run_dir, truth)
    owner = match_detections(truth, detections, match_radius, scale)
    labels = lens_labels(truth)
    scores = np.asarray(detections["score"])
    # a lens's score: its best detection; unmatched lenses are never found
    lens_score = np.full(len(truth), -np.inf)
    np.maximum.at(lens_score, owner[owner >= 0], scores[owner >= 0])
    false = (owner < 0) | ~labels[np.maximum(owner, 0)]
    # the curve: at each distinct score, lenses found and false positives per deg^2
    thresholds = np.unique(np.concatenate([scores, lens_score[np.isfinite(lens_score)]]))[::-1]
    found = _at_or_above(lens_score[labels], thresholds)
    false_counts = _at_or_above(scores[false], thresholds)
    n_pos = int(labels.sum())
    if threshold is None:
        ok = np.flatnonzero(false_counts / area <= false_positives_per_deg2)
        threshold = float(thresholds[ok[-1]]) if ok.size else math.inf
    k = int((lens_score[labels] >= threshold).sum())
    fp = int((scores[false] >= threshold).sum())
    lo, hi = wilson_interval(k, n_pos) if n_pos else (np.array([np.nan]), np.array([np.nan]))
    report = FieldScoreReport(threshold=threshold, n_lenses=n_pos, n_detections=int((owner >= 0).sum()),
                              completeness=k / n_pos if n_pos else math.nan,
                              completeness_interval=(float(lo[0]), float(hi[0])),
                              purity=k / (k + fp) if k + fp else math.nan, false_positives=fp,
                              false_positives_per_deg2=fp / area, area_deg2=area, match_radius=match_radius)
    table = truth.copy()
    table["score"] = lens_score
    table["is_lens"] = labels
    columns = list(columns) if columns else default_columns(truth, reference)
    for column in columns + list(pair or ()):
        if column not in table.colnames:
            raise SimlensError(f"no truth column {column!r}; columns include {', '.join(default_columns(truth, reference))}")
    if n_pos:
        for column in columns:
            report.tables[f"completeness_{column}"] = completeness_by(table, column, threshold, n_bins)
        if pair:
            report.tables[f"completeness_{pair[0]}_{pair[1]}"] = completeness_2d(table, pair[0], pair[1], threshold)
    report.tables["completeness_vs_false_positives"] = Table(
        {"threshold": thresholds, "n_found": found, "completeness": found / max(n_pos, 1),
         "false_positives": false_counts, "false_positives_per_deg2": false_counts / area})
    matched = detections.copy()
    matched["system_id"] = np.where(owner >= 0, np.asarray(truth["system_id"])[np.maximum(owner, 0)], -1)
    matched["false_positive"] = false
    report.tables["detections"] = matched
    write_report(report, run_dir / "scores" / name, plots, plotter=_plots)
    return report


def _at_or_above(values: np.ndarray, thresholds: np.ndarray) -> np.ndarray:
    """How many ``values`` are >= each threshold."""
    ordered = np.sort(values)
    return ordered.size - np.searchsorted(ordered, thresholds, side="left")


def _plots(report: FieldScoreReport, out: Path) -> list[str]:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    files = plot_tables(report, out)  # the completeness-by-column plots
    t = report.tables["completeness_vs_false_positives"]
    fig, ax = plt.subplots(figsize=(5, 3.8))
    ax.step(t["false_positives_per_deg2"], t["completeness"], where="post")
    ax.set_xlabel("false positives per deg$^2$")
    ax.set_ylabel("completeness")
    ax.set_ylim(-0.02, 1.02)
    ax.set_title(f"matched within {report.match_radius:g} arcsec")
    path = out / "completeness_vs_false_positives.png"
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return files + [str(path)]
