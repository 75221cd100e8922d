"""Scoring a lens finder against a run's truth: completeness, purity, false-positive rates, ROC.

A finder's output is a table of ``system_id, score`` (CSV, ECSV or FITS; higher score = more
lens-like).  It is joined with the run's truth catalogue, every system is labelled by
:func:`lens_labels`, and:

* completeness (true-positive rate) at a score threshold -- given, or chosen so that the
  false-positive rate on the non-lenses is a given value -- overall, in bins of any truth column
  and in 2D bins of two columns, each with a binomial confidence interval (Wilson score interval,
  via ``astropy.stats.binom_conf_interval``; 68.27 % by default);
* purity, and the false-positive rate by class of non-lens (the truth column ``system_class``: the
  negative classes of simlens.negatives, ``missed_caustics``, ``source_in_front``,
  ``undetectable_lens``);
* the ROC curve and its area (trapezoidal, ties counted half: the Mann-Whitney statistic).

Bins are quantiles of the lenses' values, so each holds a similar number of lenses.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Sequence

import numpy as np
from astropy.stats import binom_conf_interval
from astropy.table import Table

from ..errors import SimlensError
from ..user_tables import number_column, read_user_table, whole_number_column

__all__ = ["read_scores", "lens_labels", "roc_curve", "roc_area", "threshold_for_false_positive_rate",
           "completeness_by", "completeness_2d", "wilson_interval", "plot_tables", "describe_tables",
           "write_report", "ScoreReport", "score_run",
           "CONFIDENCE"]

CONFIDENCE = 0.6827  # one-sigma binomial intervals


def read_scores(path: str | Path) -> Table:
    """A finder's scores: a table with ``system_id`` and ``score`` columns (CSV, ECSV or FITS)."""
    table = read_user_table(path, "scores file", ("system_id", "score"))
    ids = whole_number_column(path, table, "system_id")
    if len(np.unique(ids)) != len(ids):
        raise SimlensError(f"{path}: system_id repeats; give one score per system")
    return Table({"system_id": ids, "score": number_column(path, table, "score")})


def lens_labels(truth: Table) -> np.ndarray:
    """``is_lens``: the source centre is multiply imaged (inside a caustic or the cut) and the system
    passes every cut of the recipe's selection (``selected``), and it is not a negative (the truth's
    ``is_lens`` column).  Runs without these columns fall back to two or more images in the cutout."""
    if "is_lens" in truth.colnames:
        return np.asarray(truth["is_lens"], dtype=bool)
    if "multiply_imaged" in truth.colnames:
        multiple = np.asarray(truth["multiply_imaged"], dtype=bool)
    else:
        multiple = np.asarray(truth["n_images"]) >= 2
    selected = np.asarray(truth["selected"], dtype=bool) if "selected" in truth.colnames else True
    return multiple & selected


def roc_curve(labels, scores) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """``(false-positive rate, true-positive rate, threshold)`` for every distinct score, from the
    highest threshold (nothing selected) down (everything selected); a system is selected when its
    score is >= the threshold."""
    labels, scores = np.asarray(labels, bool), np.asarray(scores, float)
    n_pos, n_neg = int(labels.sum()), int((~labels).sum())
    if n_pos == 0 or n_neg == 0:
        raise SimlensError(f"a ROC curve needs lenses and non-lenses; this run has {n_pos} and {n_neg}")
    order = np.argsort(-scores, kind="mergesort")
    s, y = scores[order], labels[order]
    distinct = np.flatnonzero(np.diff(s)) if s.size > 1 else np.empty(0, int)
    ends = np.concatenate([distinct, [s.size - 1]])
    tp = np.cumsum(y)[ends]
    fp = np.cumsum(~y)[ends]
    return (np.concatenate([[0.0], fp / n_neg]), np.concatenate([[0.0], tp / n_pos]),
            np.concatenate([[np.inf], s[ends]]))


def roc_area(labels, scores) -> float:
    """Area under the ROC curve (trapezoids; equals the Mann-Whitney U / (n_pos n_neg))."""
    fpr, tpr, _ = roc_curve(labels, scores)
    return float(np.sum(np.diff(fpr) * 0.5 * (tpr[1:] + tpr[:-1])))


def threshold_for_false_positive_rate(labels, scores, rate: float) -> float:
    """The lowest threshold whose false-positive rate does not exceed ``rate``."""
    fpr, _, thresholds = roc_curve(labels, scores)
    ok = np.flatnonzero(fpr <= rate)
    return float(thresholds[ok[-1]])


def wilson_interval(k, n) -> tuple[np.ndarray, np.ndarray]:
    """Wilson score intervals (CONFIDENCE) of k successes in n trials; nan where n = 0."""
    k, n = np.atleast_1d(k), np.atleast_1d(n)
    lo, hi = np.full(k.shape, np.nan), np.full(k.shape, np.nan)
    ok = n > 0
    if ok.any():
        lo[ok], hi[ok] = binom_conf_interval(k[ok], n[ok], confidence_level=CONFIDENCE, interval="wilson")
    return lo, hi


def _quantile_edges(values: np.ndarray, n_bins: int) -> np.ndarray:
    finite = values[np.isfinite(values)]
    if finite.size == 0:
        raise SimlensError("no finite values to bin")
    edges = np.unique(np.quantile(finite, np.linspace(0, 1, n_bins + 1)))
    if edges.size < 2:
        edges = np.array([finite.min() - 0.5, finite.max() + 0.5])
    return edges


def completeness_by(table: Table, column: str, threshold: float, n_bins: int = 6,
                    edges: Sequence[float] | None = None) -> Table:
    """Completeness of the lenses in bins of ``column`` at ``threshold``, with Wilson intervals."""
    lenses = table[np.asarray(table["is_lens"], bool)]
    values = np.asarray(lenses[column], dtype=float)
    found = np.asarray(lenses["score"]) >= threshold
    edges = np.asarray(edges, float) if edges is not None else _quantile_edges(values, n_bins)
    index = np.clip(np.searchsorted(edges, values, side="right") - 1, 0, edges.size - 2)
    inside = np.isfinite(values) & (values >= edges[0]) & (values <= edges[-1])
    n = np.bincount(index[inside], minlength=edges.size - 1)
    k = np.bincount(index[inside], weights=found[inside].astype(float), minlength=edges.size - 1).astype(int)
    lo, hi = wilson_interval(k, n)
    with np.errstate(invalid="ignore", divide="ignore"):
        frac = np.where(n > 0, k / np.maximum(n, 1), np.nan)
    out = Table({f"{column}_low": edges[:-1], f"{column}_high": edges[1:], "n_lenses": n, "n_found": k,
                 "completeness": frac, "interval_low": lo, "interval_high": hi})
    unit = getattr(table[column], "unit", None)
    if unit is not None:
        out[f"{column}_low"].unit = out[f"{column}_high"].unit = unit
    out.meta["threshold"] = threshold
    out.meta["interval"] = f"Wilson score, {CONFIDENCE:.2%} (astropy.stats.binom_conf_interval)"
    return out


def completeness_2d(table: Table, x: str, y: str, threshold: float, n_bins: int = 4) -> Table:
    """Completeness in quantile bins of two truth columns (one row per cell)."""
    lenses = table[np.asarray(table["is_lens"], bool)]
    vx, vy = np.asarray(lenses[x], float), np.asarray(lenses[y], float)
    found = np.asarray(lenses["score"]) >= threshold
    ex, ey = _quantile_edges(vx, n_bins), _quantile_edges(vy, n_bins)
    ix = np.clip(np.searchsorted(ex, vx, side="right") - 1, 0, ex.size - 2)
    iy = np.clip(np.searchsorted(ey, vy, side="right") - 1, 0, ey.size - 2)
    rows = []
    for i in range(ex.size - 1):
        for j in range(ey.size - 1):
            cell = (ix == i) & (iy == j) & np.isfinite(vx) & np.isfinite(vy)
            n, k = int(cell.sum()), int((found & cell).sum())
            lo, hi = wilson_interval(k, n)
            rows.append((ex[i], ex[i + 1], ey[j], ey[j + 1], n, k, k / n if n else math.nan, lo[0], hi[0]))
    out = Table(rows=rows, names=(f"{x}_low", f"{x}_high", f"{y}_low", f"{y}_high", "n_lenses", "n_found",
                                  "completeness", "interval_low", "interval_high"))
    out.meta["threshold"] = threshold
    return out


@dataclass
class ScoreReport:
    threshold: float
    n_lenses: int
    n_non_lenses: int
    completeness: float
    completeness_interval: tuple
    purity: float
    false_positive_rate: float
    roc_area: float
    by_class: Table
    tables: dict = field(default_factory=dict)
    files: list = field(default_factory=list)

    def describe(self) -> str:
        lo, hi = self.completeness_interval
        lines = [f"threshold {self.threshold:.6g}: completeness {self.completeness:.3f} "
                 f"[{lo:.3f}, {hi:.3f}] of {self.n_lenses} lenses; purity {self.purity:.3f}; "
                 f"false-positive rate {self.false_positive_rate:.4f} of {self.n_non_lenses} non-lenses; "
                 f"ROC area {self.roc_area:.3f}"]
        for row in self.by_class:
            lines.append(f"  non-lenses of class {row['negative_class']}: {row['n_found']}/{row['n']} above "
                         f"threshold ({row['false_positive_rate']:.4f})")
        return "\n".join(lines + describe_tables(self.tables, self.files))


def describe_tables(tables: dict, files: list) -> list[str]:
    """Summary lines of a report's 1D completeness tables and of the files written."""
    lines = []
    for name, table in tables.items():
        if name.startswith("completeness_") and "n_lenses" in table.colnames and len(table.colnames) == 7:
            column = table.colnames[0][: -len("_low")]
            cells = ", ".join(f"{r[0]:.3g}-{r[1]:.3g}: {r['completeness']:.2f}" for r in table)
            lines.append(f"  completeness by {column}: {cells}")
    return lines + [f"  wrote {f}" for f in files]


def write_report(report, out: Path, plots: bool, plotter=None) -> None:
    """Write a report's tables (ECSV), plots (PNG, by ``plotter``, default :func:`plot_tables`) and
    summary.txt into ``out``; the paths go to ``report.files``."""
    out.mkdir(parents=True, exist_ok=True)
    for table_name, t in report.tables.items():
        path = out / f"{table_name}.ecsv"
        t.write(path, format="ascii.ecsv", overwrite=True)
        report.files.append(str(path))
    if plots:
        report.files += (plotter or plot_tables)(report, out)
    summary = out / "summary.txt"
    summary.write_text(report.describe() + "\n", encoding="utf-8")
    report.files.append(str(summary))


def default_columns(truth: Table, reference_band: str) -> list[str]:
    wanted = ["einstein_radius", f"source_mag_{reference_band}", f"arc_snr_{reference_band}",
              f"psf_fwhm_{reference_band}", f"lens_mag_{reference_band}"]
    return [c for c in wanted if c in truth.colnames]


def score_run(run_dir: str | Path, scores_path: str | Path, *, threshold: float | None = None,
              false_positive_rate: float | None = None, columns: Sequence[str] | None = None,
              pair: Sequence[str] | None = None, n_bins: int = 6, name: str = "finder",
              plots: bool = True) -> ScoreReport:
    """Score a finder's output against the truth of ``run_dir``; write ECSV tables and PNG plots to
    ``run_dir/scores/<name>/``."""
    run_dir = Path(run_dir)
    truth_path = run_dir / "truth.fits"
    if not truth_path.is_file():
        raise SimlensError(f"{run_dir}: no truth.fits; is it a finished simlens run folder?")
    truth = Table.read(truth_path)
    scores = read_scores(scores_path)
    missing = np.setdiff1d(np.asarray(truth["system_id"]), np.asarray(scores["system_id"]))
    if missing.size:
        raise SimlensError(f"{scores_path}: no score for {missing.size} of the run's systems "
                           f"(first: {', '.join(str(i) for i in missing[:5])})")
    extra = np.setdiff1d(np.asarray(scores["system_id"]), np.asarray(truth["system_id"]))
    if extra.size:
        raise SimlensError(f"{scores_path}: {extra.size} system_id values are not in the run "
                           f"(first: {', '.join(str(i) for i in extra[:5])})")
    order = np.argsort(np.asarray(scores["system_id"]))
    position = np.searchsorted(np.asarray(scores["system_id"])[order], np.asarray(truth["system_id"]))
    table = truth.copy()
    table["score"] = np.asarray(scores["score"])[order][position]
    table["is_lens"] = lens_labels(truth)
    labels, values = np.asarray(table["is_lens"]), np.asarray(table["score"])
    if (threshold is None) == (false_positive_rate is None):
        raise SimlensError("give exactly one of a score threshold and a false-positive rate")
    if threshold is None:
        threshold = threshold_for_false_positive_rate(labels, values, false_positive_rate)
    n_pos, n_neg = int(labels.sum()), int((~labels).sum())
    selected = values >= threshold
    k = int((selected & labels).sum())
    lo, hi = wilson_interval(k, n_pos) if n_pos else (np.array([np.nan]), np.array([np.nan]))
    purity = k / int(selected.sum()) if selected.any() else math.nan
    fp = int((selected & ~labels).sum())
    area = roc_area(labels, values) if n_pos and n_neg else math.nan
    classes = (np.asarray(table["system_class"]).astype(str) if "system_class" in table.colnames
               else np.full(len(table), "non_lens"))
    # a multiply-imaged system that fails the detectability cuts is not a lens by the label
    classes = np.where((classes == "lens") & ~labels, "undetectable_lens", classes)
    rows = []
    for c in sorted(set(classes[~labels])):
        members = (~labels) & (classes == c)
        rows.append((c, int(members.sum()), int((members & selected).sum()),
                     (members & selected).sum() / members.sum()))
    by_class = Table(rows=rows, names=("negative_class", "n", "n_found", "false_positive_rate"),
                     dtype=(str, int, int, float)) if rows else Table(
        names=("negative_class", "n", "n_found", "false_positive_rate"), dtype=(str, int, int, float))
    report = ScoreReport(threshold=threshold, n_lenses=n_pos, n_non_lenses=n_neg,
                         completeness=k / n_pos if n_pos else math.nan,
                         completeness_interval=(float(lo[0]), float(hi[0])), purity=purity,
                         false_positive_rate=fp / n_neg if n_neg else math.nan, roc_area=area, by_class=by_class)
    reference = _reference_band(run_dir, truth)
    columns = list(columns) if columns else default_columns(truth, reference)
    for column in columns:
        if column not in table.colnames:
            raise SimlensError(f"no truth column {column!r}; columns include {', '.join(default_columns(truth, reference))}")
        if n_pos:
            report.tables[f"completeness_{column}"] = completeness_by(table, column, threshold, n_bins)
    if pair:
        x, y = pair
        for c in (x, y):
            if c not in table.colnames:
                raise SimlensError(f"no truth column {c!r}")
        if n_pos:
            report.tables[f"completeness_{x}_{y}"] = completeness_2d(table, x, y, threshold)
    if n_pos and n_neg:
        fpr, tpr, thr = roc_curve(labels, values)
        report.tables["roc"] = Table({"false_positive_rate": fpr, "true_positive_rate": tpr, "threshold": thr})
    report.tables["false_positives_by_class"] = by_class
    write_report(report, run_dir / "scores" / name, plots)
    return report


def _reference_band(run_dir: Path, truth: Table) -> str:
    """The run's reference band (from its manifest), else the first band of the truth."""
    import json

    try:
        return json.loads((run_dir / "manifest.json").read_text(encoding="utf-8"))["reference_band"]
    except (OSError, ValueError, KeyError):
        bands = [c[len("arc_snr_"):] for c in truth.colnames if c.startswith("arc_snr_")]
        return bands[0] if bands else ""


def plot_tables(report, out: Path) -> list[str]:
    """PNG plots of a report's ROC and completeness tables (other tables are skipped)."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    files = []
    for name, t in report.tables.items():
        if name == "roc":
            fig, ax = plt.subplots(figsize=(4.5, 4.5))
            ax.plot(t["false_positive_rate"], t["true_positive_rate"], lw=1.5)
            ax.plot([0, 1], [0, 1], ls=":", color="0.5")
            ax.set_xlabel("false-positive rate")
            ax.set_ylabel("completeness (true-positive rate)")
            ax.set_title(f"ROC, area {report.roc_area:.3f}")
        elif name.startswith("completeness_") and len(t.colnames) == 7:
            column = t.colnames[0][: -len("_low")]
            mid = 0.5 * (np.asarray(t[f"{column}_low"]) + np.asarray(t[f"{column}_high"]))
            half = 0.5 * (np.asarray(t[f"{column}_high"]) - np.asarray(t[f"{column}_low"]))
            c = np.asarray(t["completeness"])
            fig, ax = plt.subplots(figsize=(5, 3.5))
            ax.errorbar(mid, c, xerr=half, yerr=[c - np.asarray(t["interval_low"]), np.asarray(t["interval_high"]) - c],
                        fmt="o", capsize=2)
            ax.set_ylim(-0.02, 1.02)
            ax.set_xlabel(column)
            ax.set_ylabel("completeness")
            ax.set_title(f"threshold {report.threshold:.3g}")
        elif name.startswith("completeness_") and "n_lenses" in t.colnames:
            x, y = t.colnames[0][: -len("_low")], t.colnames[2][: -len("_low")]
            fig, ax = plt.subplots(figsize=(5, 4))
            for row in t:
                filled = row["n_lenses"] > 0
                value = float(row["completeness"]) if filled else 0.0
                ax.add_patch(plt.Rectangle((row[0], row[2]), row[1] - row[0], row[3] - row[2],
                                           facecolor=plt.cm.viridis(value) if filled else "0.9", edgecolor="w"))
                ax.text(0.5 * (row[0] + row[1]), 0.5 * (row[2] + row[3]),
                        f"{value:.2f}\n({row['n_lenses']})" if filled else "no lenses",
                        ha="center", va="center", fontsize=7, color="k" if (value > 0.6 or not filled) else "w")
            ax.set_xlim(t[0][0], max(t[x + "_high"]))
            ax.set_ylim(min(t[y + "_low"]), max(t[y + "_high"]))
            ax.set_xlabel(x)
            ax.set_ylabel(y)
            ax.set_title("completeness (lenses per cell)")
        else:
            continue
        path = out / f"{name}.png"
        fig.tight_layout()
        fig.savefig(path, dpi=110)
        plt.close(fig)
        files.append(str(path))
    return files
