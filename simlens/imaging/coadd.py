"""The pixel noise of a coadd: exposures resampled onto the coadd grid, so neighbouring pixels correlate.

A survey's deep images are sums of ``exposures`` dithered exposures, each resampled onto a common
pixel grid by an interpolation kernel (``resampling``: ``"bilinear"`` or ``"lanczos3"``, the
windowed sinc ``sinc(x) sinc(x/3)`` with its weights normalised to sum to one, which conserves flux;
both common practice in coadd pipelines).  Each exposure is offset from the coadd grid by a
sub-pixel dither, uniform in ``[0, 1)`` per axis, drawn from the band's noise seed.  Resampling
leaves the signal's flux alone (the scene is drawn on the coadd grid) but mixes each exposure's
white noise: the coadd's noise is

    n(i) = sum_e  sum_(j,k)  w_x(j - u_e) w_y(k - v_e)  sqrt(V / E) z_e(i + (j, k)),

with ``V`` the pixel variance of the whole exposure time (sky + signal Poisson and read noise, the
CCD equation), ``E`` exposures and ``z_e`` unit normals.  Its pixel variance is ``V`` times
:attr:`CoaddKernel.variance_factor` (below one), and its correlation at lag ``(dy, dx)`` the mean over
exposures of the product of the kernels' 1-D autocorrelations (:meth:`CoaddKernel.covariance`).
Sky counts of a coadd are large, so the Poisson noise is drawn as Gaussian of the same variance
(common practice); ``resampling = "none"`` keeps GalSim's CCD noise, white, as before.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["resampling_weights", "CoaddKernel", "coadd_kernel", "coadd_noise"]

_REACH = {"bilinear": 1, "lanczos3": 3}  # taps j = 1 - reach .. reach


def resampling_weights(kind: str, shift: float) -> np.ndarray:
    """The 1-D weights with which the value at ``i + shift`` (``0 <= shift < 1``) is interpolated from
    samples ``i + j``, ``j = 1 - reach .. reach``; they sum to one."""
    reach = _REACH[kind]
    x = np.arange(1 - reach, reach + 1) - shift
    if kind == "bilinear":
        weights = np.clip(1.0 - np.abs(x), 0.0, None)
    else:
        weights = np.sinc(x) * np.sinc(x / reach)
    return weights / weights.sum()


@dataclass(frozen=True)
class CoaddKernel:
    """The resampling weights of each exposure of one band of one system: rows of ``x`` and ``y``
    weights, one row an exposure."""

    x: np.ndarray  # (exposures, taps)
    y: np.ndarray

    @property
    def exposures(self) -> int:
        return self.x.shape[0]

    @property
    def variance_factor(self) -> float:
        """The coadd's pixel variance over the unresampled one: ``mean_e |w_x|^2 |w_y|^2``."""
        return float(np.mean(np.sum(self.x**2, axis=1) * np.sum(self.y**2, axis=1)))

    def covariance(self, dy: int, dx: int) -> float:
        """The noise covariance of pixels ``(dy, dx)`` apart, over the unresampled pixel variance."""
        return float(np.mean(_autocorrelation(self.y, dy) * _autocorrelation(self.x, dx)))


def _autocorrelation(weights: np.ndarray, lag: int) -> np.ndarray:
    lag = abs(int(lag))
    taps = weights.shape[1]
    if lag >= taps:
        return np.zeros(weights.shape[0])
    return np.sum(weights[:, :taps - lag] * weights[:, lag:], axis=1)


def coadd_kernel(kind: str, exposures: int, rng: np.random.Generator) -> CoaddKernel:
    """Each exposure's dither (uniform sub-pixel offsets) and its resampling weights."""
    shifts = rng.uniform(0.0, 1.0, size=(exposures, 2))
    return CoaddKernel(x=np.array([resampling_weights(kind, u) for u in shifts[:, 0]]),
                       y=np.array([resampling_weights(kind, v) for v in shifts[:, 1]]))


def coadd_noise(variance: np.ndarray, kernel: CoaddKernel, rng: np.random.Generator) -> np.ndarray:
    """Correlated noise of a coadd whose unresampled per-pixel variance is ``variance`` (see the
    module docstring); each exposure's noise is drawn on the image widened by the kernel's reach."""
    taps = kernel.x.shape[1]
    reach = taps // 2
    lo, hi = reach - 1, reach  # the widening before and after, so that tap j reads pixel i + j
    ny, nx = variance.shape
    sigma = np.sqrt(np.pad(variance, ((lo, hi), (lo, hi)), mode="edge") / kernel.exposures)
    total = np.zeros((ny, nx))
    for wx, wy in zip(kernel.x, kernel.y):
        exposure = sigma * rng.standard_normal(sigma.shape)
        rows = sum(w * exposure[j:j + ny] for j, w in enumerate(wy))
        total += sum(w * rows[:, j:j + nx] for j, w in enumerate(wx))
    return total
