"""A lens galaxy made of stars that follow its light plus a dark NFW halo (``stars_and_halo``).

The stars are an elliptical Sersic convergence with the lens light's shape and
``kappa_e = Upsilon I_e / Sigma_cr`` (``Upsilon`` the stellar mass-to-light ratio, ``I_e`` the
light's surface brightness at R_e in L_sun per arcsec^2); the halo is an NFW of mass M200 and
concentration c200 (:func:`simlens.cosmology.nfw_lens_parameters`).  The Einstein radius is not
set by the velocity dispersion here but solved for: the radius within which the mean convergence of
the circularised profiles is one, ``alpha_NFW(r) / r + M_stars(< r) / (pi r^2 Sigma_cr) = 1``
(Schneider, Ehlers & Falco 1992, eq. 8.3); 0 for a sub-critical lens.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from astropy import constants, units as u
from scipy import optimize

from ..cosmology import nfw_lens_parameters
from ..cosmology import ARCSEC_PER_RADIAN, DistanceTable
from ..imaging.light import sersic_b
from .mass import NFW, SersicMass

__all__ = ["StarsAndHalo", "stars_and_halo", "critical_density_arcsec2"]

# c^2 / (4 pi G) in M_sun per Mpc
_C2_4PIG = float((constants.c**2 / (4 * math.pi * constants.G)).to_value(u.M_sun / u.Mpc))


def critical_density_arcsec2(distances: DistanceTable, z_lens: float, z_source: float) -> float:
    """Sigma_cr = c^2 D_s / (4 pi G D_l D_ls) in M_sun per arcsec^2 of the lens plane."""
    d_l = float(distances.angular_diameter_distance(z_lens))
    d_s = float(distances.angular_diameter_distance(z_source))
    d_ls = float(distances.angular_diameter_distance_z1z2(z_lens, z_source))
    return _C2_4PIG * d_s / (d_l * d_ls) * (d_l / ARCSEC_PER_RADIAN) ** 2


@dataclass(frozen=True)
class StarsAndHalo:
    """The parameters of the two components and the derived Einstein radius (arcsec)."""

    stellar_kappa_e: float
    halo_kappa_s: float
    halo_scale_radius: float
    halo_concentration: float
    einstein_radius: float


def stars_and_halo(luminosity: float, mass_to_light: float, half_light_radius: float, sersic_index: float,
                   halo_mass: float, concentration: float | None, z_lens: float, z_source: float,
                   distances: DistanceTable) -> StarsAndHalo:
    """Both components' lens parameters for a galaxy of ``luminosity`` (L_sun) and R_e (arcsec)."""
    sigma_cr = critical_density_arcsec2(distances, z_lens, z_source)
    n, b = sersic_index, sersic_b(sersic_index)
    norm = 2.0 * math.pi * n * half_light_radius**2 * math.exp(b) * b ** (-2.0 * n) * math.gamma(2.0 * n)
    kappa_e = mass_to_light * luminosity / norm / sigma_cr
    cosmo = distances.cosmology
    if concentration is None:
        from ..cosmology import duffy_concentration

        concentration = duffy_concentration(halo_mass, z_lens, cosmo.h)
    kappa_s, r_s = nfw_lens_parameters(halo_mass, concentration, z_lens, z_source, cosmo)
    stars = SersicMass(kappa_e=kappa_e, half_light_radius=half_light_radius, sersic_index=n)
    halo = NFW(kappa_s=kappa_s, scale_radius=r_s)

    def excess(r):
        stellar = stars.enclosed_mass_circular(r) / (math.pi * r * r)
        dark = float(halo.radial_deflection(np.array(r / r_s))) / r
        return stellar + dark - 1.0

    lo, hi = 1e-3 * half_light_radius, 50.0
    theta_e = float(optimize.brentq(excess, lo, hi, xtol=1e-7)) if excess(lo) > 0 > excess(hi) else 0.0
    return StarsAndHalo(stellar_kappa_e=kappa_e, halo_kappa_s=kappa_s, halo_scale_radius=r_s,
                        halo_concentration=float(concentration), einstein_radius=theta_e)
