"""How many quasars there are: a published quasar luminosity function, on the sky.

The double power law of Richards et al. (2005, MNRAS 360, 839; 2SLAQ + SDSS, from memory), per
comoving Mpc^3 per magnitude of absolute g (AB, h = 0.7):

    Phi(M, z) = Phi_* / (10^(0.4 (alpha + 1) (M - M_*(z))) + 10^(0.4 (beta + 1) (M - M_*(z)))),
    M_*(z) = M_*(0) - 2.5 (k_1 z + k_2 z^2),

alpha = -3.31, beta = -1.45, Phi_* = 1.83e-6, M_*(0) = -21.61, k_1 = 1.39, k_2 = -0.29; fitted
for 0.4 < z < 2.1 and extrapolated beyond here (M_* brightens until z = 2.4 and fades after, a
crude stand-in for the decline of Fan et al. 2001 above z = 3).  A quasar of absolute g magnitude
M (its continuum f_nu ~ nu^alpha_nu) has in a band of mean wavelength lambda

    m = M + DM(z) - 2.5 log10(1 + z) + 2.5 alpha_nu log10(lambda / ((1 + z) 470 nm))

(the AB bandwidth term of a redshifted flat-in-nu bandpass and the power law's colour from rest g).
:class:`QuasarPopulation` tabulates the quasars per arcmin^2 on a (z, m) grid: their sky density
between magnitude and redshift limits and joint draws of (z, m) by the inverse CDF.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

__all__ = ["DoublePowerLaw", "QUASAR_LUMINOSITY_FUNCTIONS", "QuasarPopulation", "REST_G_NM"]

REST_G_NM = 470.0  # the rest wavelength of the luminosity function's M_g (SDSS g, about)
ARCMIN2_PER_STERADIAN = (180.0 * 60.0 / math.pi) ** 2


@dataclass(frozen=True)
class DoublePowerLaw:
    """A double power-law luminosity function with a quadratic evolution of M_* (see the module)."""

    phi_star: float  # Mpc^-3 mag^-1 (h = 0.7)
    m_star0: float
    alpha: float
    beta: float
    k1: float
    k2: float
    reference: str

    def m_star(self, z):
        return self.m_star0 - 2.5 * (self.k1 * np.asarray(z, float) + self.k2 * np.asarray(z, float) ** 2)

    def __call__(self, absolute_magnitude, z, h: float = 0.7):
        d = np.asarray(absolute_magnitude, float) - self.m_star(z)
        return self.phi_star * (h / 0.7) ** 3 / (10 ** (0.4 * (self.alpha + 1) * d) + 10 ** (0.4 * (self.beta + 1) * d))


QUASAR_LUMINOSITY_FUNCTIONS = {
    "richards2005": DoublePowerLaw(1.83e-6, -21.61, -3.31, -1.45, 1.39, -0.29, "Richards et al. 2005, from memory"),
}


class QuasarPopulation:
    """Quasars between apparent magnitudes ``m_range`` (band of mean wavelength ``wavelength_nm``)
    and redshifts ``z_range``: their sky density and joint (z, m) draws."""

    def __init__(self, function: DoublePowerLaw, distances, h: float, z_range: tuple, m_range: tuple,
                 wavelength_nm: float, spectral_index: float, steps: int = 300):
        self.function = function
        z = np.linspace(z_range[0], z_range[1], steps)
        m = np.linspace(m_range[0], m_range[1], steps)
        modulus = np.asarray(distances.distmod(z), float)
        offset = (modulus - 2.5 * np.log10(1 + z)
                  + 2.5 * spectral_index * np.log10(wavelength_nm / ((1 + z) * REST_G_NM)))  # m - M
        absolute = m[None, :] - offset[:, None]
        per_sr = function(absolute, z[:, None], h) * np.asarray(distances.differential_comoving_volume(z), float)[:, None]
        cell = 0.25 * (per_sr[1:, 1:] + per_sr[:-1, 1:] + per_sr[1:, :-1] + per_sr[:-1, :-1]) * np.diff(z)[:, None] * np.diff(m)[None, :]
        self._z, self._m, self._cells = z, m, cell
        self.per_steradian = float(cell.sum())
        self._cdf = np.cumsum(cell.ravel()) / self.per_steradian

    @property
    def sky_density(self) -> float:
        """Quasars per arcmin^2 within the limits."""
        return self.per_steradian / ARCMIN2_PER_STERADIAN

    def draw(self, u_cell, u_z, u_m) -> tuple[np.ndarray, np.ndarray]:
        """``(z, m)`` for three arrays of uniform variates: a grid cell by its probability, then a
        uniform place inside it."""
        index = np.minimum(np.searchsorted(self._cdf, np.asarray(u_cell, float), side="right"), self._cdf.size - 1)
        i, j = np.divmod(index, self._m.size - 1)
        z = self._z[i] + np.asarray(u_z, float) * (self._z[i + 1] - self._z[i])
        m = self._m[j] + np.asarray(u_m, float) * (self._m[j + 1] - self._m[j])
        return z, m
