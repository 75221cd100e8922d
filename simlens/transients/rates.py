"""How many type Ia supernovae explode: a published volumetric rate, over a survey's time and sky.

The volumetric rate (events per year per comoving Mpc^3, in the explosions' rest frame) of
Dilday et al. (2010, ApJ 713, 1026; SDSS-II, from memory):

    r_V(z) = 2.69e-5 (1 + z)^1.5  yr^-1 Mpc^-3 h_70^3,

fitted at z < 0.3 and extrapolated beyond (higher-redshift rates flatten above z ~ 1; an
approximation stated in the README).  Over an observer-frame window T the events per unit solid
angle between z and z + dz are ``r_V(z) T / (1 + z) dV_C/dz/dOmega`` (time dilation: Hogg 1999
for dV_C/dz/dOmega).  :class:`SupernovaPopulation` tabulates that distribution: its sky density
(per arcmin^2, for sky mode) and its redshifts (drawn by the inverse CDF).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

__all__ = ["VolumetricRate", "SUPERNOVA_RATES", "SupernovaPopulation"]

DAYS_PER_YEAR = 365.25
ARCMIN2_PER_STERADIAN = (180.0 * 60.0 / math.pi) ** 2


@dataclass(frozen=True)
class VolumetricRate:
    """``r_V(z) = r_0 (1 + z)^alpha`` events per year per Mpc^3, ``r_0`` for h = 0.7."""

    r0: float
    alpha: float
    reference: str

    def __call__(self, z, h: float = 0.7):
        return self.r0 * (h / 0.7) ** 3 * (1.0 + np.asarray(z, dtype=float)) ** self.alpha


SUPERNOVA_RATES = {"dilday2010": VolumetricRate(2.69e-5, 1.5, "Dilday et al. 2010 (SDSS-II), from memory")}


class SupernovaPopulation:
    """Type Ia supernovae with maxima in an observer-frame window of ``window_days`` between
    redshifts ``z_range``: their density on the sky and their redshift distribution."""

    def __init__(self, rate: VolumetricRate, distances, h: float, z_range: tuple, window_days: float):
        self.rate, self.z_range, self.window_days = rate, tuple(z_range), float(window_days)
        z = np.linspace(z_range[0], z_range[1], 2001)
        per_steradian = (rate(z, h) * window_days / DAYS_PER_YEAR / (1.0 + z)
                         * np.asarray(distances.differential_comoving_volume(z), float))
        cumulative = np.concatenate([[0.0], np.cumsum(0.5 * (per_steradian[1:] + per_steradian[:-1]) * np.diff(z))])
        self._z, self._cdf = z, cumulative / cumulative[-1]
        self.per_steradian = float(cumulative[-1])

    @property
    def sky_density(self) -> float:
        """Supernovae per arcmin^2 with maxima in the window."""
        return self.per_steradian / ARCMIN2_PER_STERADIAN

    def draw_redshift(self, u):
        """Redshifts for uniform variates ``u`` (inverse CDF)."""
        return np.interp(np.asarray(u, dtype=float), self._cdf, self._z)
