"""Lens galaxies as a population: the velocity dispersion function and the comoving volume.

The modified Schechter form of Sheth et al. (2003, ApJ 594, 225, eq. 4),

    phi(sigma) dsigma = phi_* (sigma/sigma_*)^alpha exp[-(sigma/sigma_*)^beta] beta / Gamma(alpha/beta) dsigma/sigma,

has a convenient property: ``x = (sigma/sigma_*)^beta`` follows a Gamma(alpha/beta) distribution, so
the CDF is a regularised incomplete gamma function and draws are exact inverse-CDF draws (with any
truncation).  ``phi_*`` is the comoving number density of all galaxies it describes.

:class:`DeflectorPopulation` draws the lens redshift and sigma as *one* population: the number of
galaxies in ``dz dsigma`` per steradian is ``phi(sigma, z) dV_C/dz/dOmega``.  Optional evolution:
``phi_*(z) = phi_*(0) (1 + z)^density_evolution`` and ``sigma_*(z) = sigma_*(0) (1 + z)^sigma_evolution``.

``weight_power`` tilts the population by ``sigma^weight_power``: with 4 it is weighted by the SIS
lensing cross-section (``theta_E^2 ~ sigma^4``), which is again a modified Schechter function with
``alpha + 4`` -- exact, no rejection.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import special

from ..cosmology import DistanceTable

__all__ = ["VelocityFunction", "VELOCITY_FUNCTIONS", "DeflectorPopulation"]


@dataclass(frozen=True)
class VelocityFunction:
    """A modified Schechter velocity dispersion function.

    Parameters
    ----------
    phi_star : comoving density, h^3 Mpc^-3 (multiplied by h^3 for Mpc^-3).
    sigma_star : km/s.
    alpha, beta : shape (Sheth et al. 2003 notation).
    """

    phi_star: float
    sigma_star: float
    alpha: float
    beta: float
    reference: str = ""

    def density(self, hubble_h: float) -> float:
        """phi_* in Mpc^-3 for the cosmology's h."""
        return self.phi_star * hubble_h**3

    def tilted(self, power: float) -> "VelocityFunction":
        """The shape of ``sigma^power phi(sigma)`` (normalisation not kept)."""
        return VelocityFunction(self.phi_star, self.sigma_star, self.alpha + power, self.beta, self.reference)

    def pdf(self, sigma, sigma_star: float | None = None) -> np.ndarray:
        """Probability density of sigma (per km/s), normalised over 0 < sigma < inf."""
        s_star = self.sigma_star if sigma_star is None else sigma_star
        x = np.asarray(sigma, dtype=float) / s_star
        return (self.beta / special.gamma(self.alpha / self.beta) * x ** (self.alpha - 1.0)
                * np.exp(-(x**self.beta)) / s_star)

    def cdf(self, sigma, sigma_star: float | None = None) -> np.ndarray:
        s_star = self.sigma_star if sigma_star is None else sigma_star
        x = (np.asarray(sigma, dtype=float) / s_star) ** self.beta
        return special.gammainc(self.alpha / self.beta, x)

    def fraction_between(self, low: float, high: float, sigma_star: float | None = None) -> float:
        return float(self.cdf(high, sigma_star) - self.cdf(low, sigma_star))

    def moment(self, power: float, low: float, high: float, sigma_star: float | None = None) -> float:
        """``<sigma^power>`` over ``low <= sigma <= high`` (closed form via incomplete gammas)."""
        s_star = self.sigma_star if sigma_star is None else sigma_star
        a, a_p = self.alpha / self.beta, (self.alpha + power) / self.beta
        x_lo, x_hi = (low / s_star) ** self.beta, (high / s_star) ** self.beta
        num = special.gamma(a_p) * (special.gammainc(a_p, x_hi) - special.gammainc(a_p, x_lo))
        den = special.gamma(a) * (special.gammainc(a, x_hi) - special.gammainc(a, x_lo))
        return float(s_star**power * num / den)

    def draw(self, u, low: float, high: float, sigma_star: float | None = None) -> np.ndarray:
        """Inverse-CDF draws on ``[low, high]`` from uniform variates ``u``."""
        s_star = self.sigma_star if sigma_star is None else sigma_star
        a = self.alpha / self.beta
        p_lo = special.gammainc(a, (low / s_star) ** self.beta)
        p_hi = special.gammainc(a, (high / s_star) ** self.beta)
        x = special.gammaincinv(a, p_lo + np.asarray(u) * (p_hi - p_lo))
        return np.clip(s_star * x ** (1.0 / self.beta), low, high)


# Published fits (phi_* in h^3 Mpc^-3, sigma_* in km/s); values from memory, as commonly quoted.
VELOCITY_FUNCTIONS = {
    # Choi, Park & Vogeley (2007, ApJ 658, 884): SDSS early-type galaxies.
    "choi2007": VelocityFunction(8.0e-3, 161.0, 2.32, 2.67, "Choi, Park & Vogeley 2007"),
    # Sheth et al. (2003, ApJ 594, 225): SDSS early types.
    "sheth2003": VelocityFunction(2.0e-3, 88.8, 6.5, 1.93, "Sheth et al. 2003"),
}


class DeflectorPopulation:
    """Joint draws of ``(sigma, z_lens)`` from ``phi(sigma, z) dV_C/dz``.

    Parameters
    ----------
    function : the velocity dispersion function at z = 0.
    distances : the run's :class:`~simlens.distances.DistanceTable`.
    redshift_range, sigma_range : the population's limits (km/s for sigma).
    density_evolution, sigma_evolution : exponents of (1 + z) for phi_* and sigma_*.
    weight_power : tilt by sigma^weight_power (4: SIS cross-section weighting; see module doc).
    """

    GRID_POINTS = 801

    def __init__(self, function: VelocityFunction, distances: DistanceTable, redshift_range: tuple,
                 sigma_range: tuple, density_evolution: float = 0.0, sigma_evolution: float = 0.0,
                 weight_power: float = 0.0):
        self.function = function
        self.distances = distances
        self.redshift_range = tuple(float(z) for z in redshift_range)
        self.sigma_range = tuple(float(s) for s in sigma_range)
        self.density_evolution = float(density_evolution)
        self.sigma_evolution = float(sigma_evolution)
        self.weight_power = float(weight_power)
        self._shape = function.tilted(weight_power)
        z = np.linspace(*self.redshift_range, self.GRID_POINTS)
        self._z = z
        self._dndz = self.number_per_redshift(z, weighted=True)
        cdf = np.concatenate([[0.0], np.cumsum(0.5 * (self._dndz[1:] + self._dndz[:-1]) * np.diff(z))])
        self._cdf = cdf / cdf[-1]

    def sigma_star(self, z) -> np.ndarray:
        return self.function.sigma_star * (1.0 + np.asarray(z)) ** self.sigma_evolution

    def number_per_redshift(self, z, weighted: bool = False) -> np.ndarray:
        """dN/dz/dOmega (galaxies per steradian per unit z) within the sigma range; with
        ``weighted`` the sigma^weight_power tilt is included (in (km/s)^weight_power)."""
        z = np.asarray(z, dtype=float)
        phi = self.function.density(self.distances.cosmology.h) * (1.0 + z) ** self.density_evolution
        s_star = self.sigma_star(z)
        lo, hi = self.sigma_range
        fraction = np.array([self.function.fraction_between(lo, hi, s) for s in np.atleast_1d(s_star)])
        if weighted and self.weight_power:
            fraction = fraction * np.array([self.function.moment(self.weight_power, lo, hi, s)
                                            for s in np.atleast_1d(s_star)])
        fraction = fraction.reshape(np.shape(z)) if np.ndim(z) else float(fraction[0])
        return phi * fraction * self.distances.differential_comoving_volume(z)

    def sky_density(self) -> float:
        """Galaxies per steradian in the population's redshift and sigma ranges."""
        z = self._z
        n = self.number_per_redshift(z)
        return float(np.sum(0.5 * (n[1:] + n[:-1]) * np.diff(z)))

    def draw_redshift(self, u) -> np.ndarray:
        return np.interp(u, self._cdf, self._z)

    def draw_sigma(self, u, z) -> np.ndarray:
        lo, hi = self.sigma_range
        s_star = self.sigma_star(z)
        return self._shape.draw(u, lo, hi, s_star)

    def draw(self, rng: np.random.Generator) -> tuple[float, float]:
        """One ``(sigma [km/s], z_lens)``."""
        z = float(self.draw_redshift(rng.uniform()))
        return float(self.draw_sigma(rng.uniform(), z)), z
