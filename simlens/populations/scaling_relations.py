"""Published galaxy scaling relations used to draw physically consistent lenses and sources.

Lens light (early types, rest-frame r band, AB, h = 0.7):

* :class:`FaberJackson` -- ``L ~ sigma^slope`` (Faber & Jackson 1976) with Gaussian scatter in
  magnitude; default normalisation M_r = -21.6 at sigma = 200 km/s, approximately the SDSS
  early-type relation of Bernardi et al. (2003b, AJ 125, 1849) -- values from memory.
* :class:`FundamentalPlane` -- ``log10 R_e = a log10 sigma + b mu_e + c`` with R_e in kpc and
  ``mu_e`` the mean surface brightness within R_e (mag/arcsec^2, rest frame, no cosmological
  dimming); defaults a = 1.49, b = 0.30 (the I_e exponent -0.75 of their paper times -0.4),
  c = -8.778: Bernardi et al. (2003c, AJ 125, 1866), r* band, maximum-likelihood fit (from memory).
  Given sigma and M the plane fixes R_e, because mu_e itself depends on R_e.
* :class:`EarlyTypeJointDistribution` -- (M, log10 R_e, log10 sigma) of early types as one
  trivariate Gaussian: Bernardi et al. (2003b, AJ 125, 1849), r* band, maximum likelihood, z = 0,
  h = 0.7 (from memory): means -21.15, 0.36, 2.20; dispersions 0.84 mag, 0.25 dex, 0.11 dex;
  correlations rho_RM = -0.88, rho_VM = -0.77, rho_RV = 0.54. Drawing (M, R_e) given sigma from it
  keeps galaxies on the plane: its thinnest direction is log R_e = 1.49 log sigma + 0.295 mu_e,
  Bernardi et al. (2003c)'s plane (tests/test_populations.py), 0.05 dex thick.

Sources (star-forming galaxies):

* :class:`NumberCounts` -- ``N(<m) = density (arcmin^-2) 10^(slope (m - pivot))``; defaults
  46 arcmin^-2 at i = 25 and slope 0.31: LSST Science Book (2009, eq. 3.7), from memory.
* :class:`RedshiftGivenMagnitude` -- ``p(z | m) = z^2 / (2 z0^3) exp(-z / z0)`` with
  ``z0 = 0.0417 m - 0.744``: LSST Science Book (2009, eq. 3.8), from memory; valid for i of about
  21 to 27 (z0 is floored at 0.05).
* :class:`SizeLuminosity` -- Shen et al. (2003, MNRAS 343, 978, eq. 18 and table 1) late types,
  ``log10 R_50/kpc = -0.4 alpha M + (beta - alpha) log10(1 + 10^(-0.4 (M - M0))) + gamma`` with
  alpha = 0.21, beta = 0.53, gamma = -1.31, M0 = -20.52, log-normal scatter
  ``sigma_lnR = sigma2 + (sigma1 - sigma2) / (1 + 10^(-0.8 (M - M0)))`` with sigma1 = 0.48,
  sigma2 = 0.25 (from memory), and evolution ``R ~ (1 + z)^-0.75`` at fixed luminosity relative to
  z = 0.1 (van der Wel et al. 2014, ApJ 788, 28, late types; from memory).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

__all__ = ["FaberJackson", "FundamentalPlane", "EarlyTypeJointDistribution", "NumberCounts", "RedshiftGivenMagnitude", "SizeLuminosity",
           "StellarToHaloMass", "SUN_ABSOLUTE_MAGNITUDE_R", "KPC_AT_10PC_IN_ARCSEC_MAG"]

SUN_ABSOLUTE_MAGNITUDE_R = 4.65  # AB, SDSS r (Willmer 2018, ApJS 236, 47; from memory)
# 5 log10(arcsec subtended by 1 kpc at 10 pc) = 5 log10(206264.8 * 100)
KPC_AT_10PC_IN_ARCSEC_MAG = 5.0 * math.log10(206264.806 * 100.0)


@dataclass(frozen=True)
class FaberJackson:
    slope: float = 4.0
    magnitude_at_reference: float = -21.6
    reference_sigma: float = 200.0  # km/s
    scatter: float = 0.4  # mag

    def mean_magnitude(self, sigma) -> np.ndarray:
        return self.magnitude_at_reference - 2.5 * self.slope * np.log10(np.asarray(sigma) / self.reference_sigma)

    def draw(self, sigma, rng) -> float:
        return float(self.mean_magnitude(sigma) + self.scatter * rng.standard_normal())

    def mean_sigma(self, absolute_magnitude) -> np.ndarray:
        """The relation inverted: sigma (km/s) of a galaxy of magnitude M."""
        return self.reference_sigma * 10 ** (-(np.asarray(absolute_magnitude) - self.magnitude_at_reference) / (2.5 * self.slope))


@dataclass(frozen=True)
class FundamentalPlane:
    a: float = 1.49
    b: float = 0.30
    c: float = -8.778
    scatter: float = 0.1  # dex in R_e at fixed sigma and mu_e (common practice, from memory)

    @staticmethod
    def mean_surface_brightness(absolute_magnitude, radius_kpc) -> np.ndarray:
        """<mu>_e within R_e (mag/arcsec^2) of a galaxy of total M: half the light in pi R_e^2."""
        return (np.asarray(absolute_magnitude) + 2.5 * math.log10(2.0 * math.pi)
                + 5.0 * np.log10(radius_kpc) + KPC_AT_10PC_IN_ARCSEC_MAG)

    def mean_log_radius(self, sigma, absolute_magnitude) -> np.ndarray:
        """log10 R_e (kpc) on the plane: solves log R = a log sigma + b mu_e(M, R) + c for R."""
        k = 2.5 * math.log10(2.0 * math.pi) + KPC_AT_10PC_IN_ARCSEC_MAG
        rhs = self.a * np.log10(sigma) + self.b * (np.asarray(absolute_magnitude) + k) + self.c
        return rhs / (1.0 - 5.0 * self.b)

    def draw_radius(self, sigma, absolute_magnitude, rng) -> float:
        """R_e in kpc.  The scatter is applied perpendicular to nothing in particular: as a
        log-normal scatter of R_e at fixed sigma and M (common practice)."""
        return float(10 ** (self.mean_log_radius(sigma, absolute_magnitude) + self.scatter * rng.standard_normal()))


@dataclass(frozen=True)
class EarlyTypeJointDistribution:
    """Early types' (M, log10 R_e / kpc, log10 sigma / km s^-1) as one trivariate Gaussian (rest r,
    AB, z = 0; Bernardi et al. 2003b, from memory). Unlike Faber-Jackson followed by the plane, the
    luminosity and size at fixed sigma come from the conditional law, so their scatters are
    correlated along the plane and the mean relation is the forward one (M given sigma, not the
    inverse fit sigma given M)."""

    mean_magnitude: float = -21.15
    mean_log_radius: float = 0.36
    mean_log_sigma: float = 2.20
    magnitude_dispersion: float = 0.84
    log_radius_dispersion: float = 0.25
    log_sigma_dispersion: float = 0.11
    radius_magnitude_correlation: float = -0.88
    sigma_magnitude_correlation: float = -0.77
    radius_sigma_correlation: float = 0.54

    def covariance(self) -> np.ndarray:
        """The 3 x 3 covariance of (M, log R_e, log sigma)."""
        d = np.array([self.magnitude_dispersion, self.log_radius_dispersion, self.log_sigma_dispersion])
        rho = np.array([[1.0, self.radius_magnitude_correlation, self.sigma_magnitude_correlation],
                        [self.radius_magnitude_correlation, 1.0, self.radius_sigma_correlation],
                        [self.sigma_magnitude_correlation, self.radius_sigma_correlation, 1.0]])
        return rho * np.outer(d, d)

    def draw_given_sigma(self, sigma, normals: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """(M, log10 R_e) at each sigma, from two standard normals per galaxy (``normals`` of shape
        (n, 2)): the Gaussian conditional law, its covariance factored by Cholesky."""
        c = self.covariance()
        gain = c[:2, 2] / c[2, 2]
        conditional = c[:2, :2] - np.outer(c[:2, 2], c[:2, 2]) / c[2, 2]
        offset = np.log10(np.asarray(sigma, dtype=float)) - self.mean_log_sigma
        mean = np.array([self.mean_magnitude, self.mean_log_radius])[:, None] + gain[:, None] * offset
        drawn = mean + np.linalg.cholesky(conditional) @ np.asarray(normals, dtype=float).T
        return drawn[0], drawn[1]

    def mean_sigma_given_magnitude(self, absolute_magnitude) -> np.ndarray:
        """sigma (km/s) of the conditional mean log sigma at M (the relation to infer sigma from light)."""
        c = self.covariance()
        offset = np.asarray(absolute_magnitude, dtype=float) - self.mean_magnitude
        return 10 ** (self.mean_log_sigma + c[2, 0] / c[0, 0] * offset)


@dataclass(frozen=True)
class NumberCounts:
    density: float = 46.0  # arcmin^-2 brighter than the pivot
    pivot: float = 25.0
    slope: float = 0.31

    def cumulative(self, magnitude) -> np.ndarray:
        """N(<m) per arcmin^2."""
        return self.density * 10 ** (self.slope * (np.asarray(magnitude) - self.pivot))

    def between(self, bright: float, faint: float) -> float:
        return float(self.cumulative(faint) - self.cumulative(bright))

    def draw(self, bright: float, faint: float, u) -> np.ndarray:
        """Inverse CDF of dN/dm ~ 10^(slope m) on [bright, faint]."""
        lo, hi = 10 ** (self.slope * bright), 10 ** (self.slope * faint)
        return np.log10(lo + np.asarray(u) * (hi - lo)) / self.slope


@dataclass(frozen=True)
class RedshiftGivenMagnitude:
    z0_slope: float = 0.0417
    z0_intercept: float = -0.744
    z0_floor: float = 0.05

    def z0(self, magnitude) -> np.ndarray:
        return np.maximum(self.z0_slope * np.asarray(magnitude) + self.z0_intercept, self.z0_floor)

    def draw(self, magnitude, low: float, high: float, u) -> np.ndarray:
        """z ~ z^2 exp(-z/z0) truncated to [low, high]: z/z0 is Gamma(3)."""
        from scipy import special

        z0 = self.z0(magnitude)
        p_lo, p_hi = special.gammainc(3.0, low / z0), special.gammainc(3.0, high / z0)
        return np.clip(z0 * special.gammaincinv(3.0, p_lo + np.asarray(u) * (p_hi - p_lo)), low, high)


@dataclass(frozen=True)
class SizeLuminosity:
    alpha: float = 0.21
    beta: float = 0.53
    gamma: float = -1.31
    m0: float = -20.52
    sigma1: float = 0.48
    sigma2: float = 0.25
    evolution: float = -0.75
    reference_redshift: float = 0.1

    def mean_log_radius(self, absolute_magnitude, redshift=0.1) -> np.ndarray:
        m = np.asarray(absolute_magnitude, dtype=float)
        log_r = (-0.4 * self.alpha * m + (self.beta - self.alpha) * np.log10(1.0 + 10 ** (-0.4 * (m - self.m0)))
                 + self.gamma)
        return log_r + self.evolution * np.log10((1.0 + np.asarray(redshift)) / (1.0 + self.reference_redshift))

    def scatter_ln(self, absolute_magnitude) -> np.ndarray:
        m = np.asarray(absolute_magnitude, dtype=float)
        return self.sigma2 + (self.sigma1 - self.sigma2) / (1.0 + 10 ** (-0.8 * (m - self.m0)))

    def draw(self, absolute_magnitude, redshift, rng) -> float:
        """R_50 in kpc."""
        log_r = self.mean_log_radius(absolute_magnitude, redshift)
        return float(10 ** log_r * math.exp(float(self.scatter_ln(absolute_magnitude)) * rng.standard_normal()))


@dataclass(frozen=True)
class UVSizeLuminosity:
    """Rest-frame ultraviolet sizes of star-forming galaxies (Shibuya, Ouchi & Harikane 2015, ApJS
    219, 15; from memory): r_e = B (1 + z)^beta kpc for galaxies of (0.3-1) L*_UV(z = 3), scaled
    by (L_UV / L_ref)^alpha, with a log-normal scatter; L* at M_UV = -21.0 (Steidel et al. 1999, from
    memory), L_ref its middle, 0.6 L*."""

    normalisation: float = 6.9  # kpc at z = 0
    evolution: float = -1.3
    alpha: float = 0.27
    star_magnitude: float = -21.0  # M*_UV at z = 3
    reference_fraction: float = 0.6
    scatter: float = 0.45  # natural log (0.2 dex)

    def mean_log_radius(self, uv_absolute_magnitude, redshift) -> np.ndarray:
        m = np.asarray(uv_absolute_magnitude, dtype=float)
        luminosity = 10 ** (-0.4 * (m - self.star_magnitude)) / self.reference_fraction
        return (math.log10(self.normalisation) + self.evolution * np.log10(1.0 + np.asarray(redshift))
                + self.alpha * np.log10(luminosity))

    def scatter_ln(self, uv_absolute_magnitude) -> np.ndarray:
        return np.full(np.shape(uv_absolute_magnitude), self.scatter)


@dataclass(frozen=True)
class StellarToHaloMass:
    """Stellar mass of a halo of mass M at redshift z (Moster, Naab & White 2013, MNRAS 428, 3121,
    eq. 2 with the redshift dependence of eqs. 11-14 and the best fit of their Table 1; from memory):

        m / M = 2 N [(M / M1)^-beta + (M / M1)^gamma]^-1,

    ``log10 M1 = M10 + M11 z/(1+z)`` and likewise ``N``, ``beta``, ``gamma``.  At ``M = M1`` the
    ratio is ``N`` (0.0351 at z = 0): the peak efficiency of star formation."""

    m10: float = 11.590
    m11: float = 1.195
    n10: float = 0.0351
    n11: float = -0.0247
    beta10: float = 1.376
    beta11: float = -0.826
    gamma10: float = 0.608
    gamma11: float = 0.329

    def stellar_mass(self, halo_mass, z: float) -> np.ndarray:
        a = z / (1.0 + z)
        m1 = 10 ** (self.m10 + self.m11 * a)
        n = self.n10 + self.n11 * a
        beta, gamma = self.beta10 + self.beta11 * a, self.gamma10 + self.gamma11 * a
        x = np.asarray(halo_mass, dtype=float) / m1
        return np.asarray(halo_mass, dtype=float) * 2.0 * n / (x ** (-beta) + x**gamma)
