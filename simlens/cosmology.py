"""Cosmology from a recipe, and the distance ratios that set lens strengths.

Uses astropy.cosmology: a named realisation (``Planck18``, ``WMAP9``, ...) or explicit parameters.
"""

from __future__ import annotations

import math

import astropy.units as u
from astropy import constants
from astropy import cosmology as astropy_cosmology

__all__ = ["named_cosmology", "flat_or_curved_cosmology", "einstein_radius_sis", "ARCSEC_PER_RADIAN",
           "angular_diameter_distance_between", "critical_surface_density", "nfw_lens_parameters",
           "duffy_concentration"]

ARCSEC_PER_RADIAN = 180.0 * 3600.0 / math.pi
_C_KM_S = constants.c.to_value(u.km / u.s)


def available_names() -> tuple[str, ...]:
    return tuple(astropy_cosmology.realizations.available)


def named_cosmology(name: str):
    """An astropy built-in realisation by name, e.g. ``"Planck18"``."""
    if name not in available_names():
        raise ValueError(f"unknown cosmology {name!r}; astropy provides {', '.join(available_names())}")
    return getattr(astropy_cosmology, name)


def flat_or_curved_cosmology(H0: float, Om0: float, Ode0: float | None = None, Tcmb0: float = 0.0,
                             Ob0: float | None = None, name: str = "recipe"):
    """``FlatLambdaCDM`` when ``Ode0`` is omitted, else ``LambdaCDM`` (H0 in km/s/Mpc)."""
    kwargs = dict(H0=H0, Om0=Om0, Tcmb0=Tcmb0, name=name)
    if Ob0 is not None:
        kwargs["Ob0"] = Ob0
    if Ode0 is None:
        return astropy_cosmology.FlatLambdaCDM(**kwargs)
    return astropy_cosmology.LambdaCDM(Ode0=Ode0, **kwargs)


def angular_diameter_distance_between(cosmo, z1: float, z2: float) -> float:
    """Angular-diameter distance (Mpc) from redshift ``z1`` to ``z2 > z1`` (``z1 = 0``: from us)."""
    if z1 == 0.0:
        return float(cosmo.angular_diameter_distance(z2).to_value(u.Mpc))
    try:  # astropy >= 8: two-redshift form
        d = cosmo.angular_diameter_distance(z1, z2)
    except TypeError:  # older astropy
        d = cosmo.angular_diameter_distance_z1z2(z1, z2)
    return float(d.to_value(u.Mpc))


def critical_surface_density(cosmo, z_lens: float, z_source: float):
    """``Sigma_cr = c^2 D_s / (4 pi G D_l D_ls)`` as an astropy Quantity (M_sun / Mpc^2)."""
    d_l = cosmo.angular_diameter_distance(z_lens)
    d_s = cosmo.angular_diameter_distance(z_source)
    d_ls = angular_diameter_distance_between(cosmo, z_lens, z_source) * u.Mpc
    return (constants.c**2 * d_s / (4 * math.pi * constants.G * d_l * d_ls)).to(u.M_sun / u.Mpc**2)


def duffy_concentration(m200: float, z: float, h: float = 0.7) -> float:
    """Mass-concentration relation of Duffy et al. (2008, MNRAS 390, L64), their full-sample NFW fit
    for M_200 (critical): ``c = 5.71 (M / 2e12 h^-1 M_sun)^-0.084 (1 + z)^-0.47`` (coefficients
    from memory; check against the paper's table 1 before quoting)."""
    return 5.71 * (m200 / (2e12 / h)) ** -0.084 * (1.0 + z) ** -0.47


def nfw_lens_parameters(m200: float, concentration: float | None, z_lens: float, z_source: float, cosmo):
    """``(kappa_s, scale_radius_arcsec)`` of an NFW halo of mass ``m200`` (M_sun, within the radius
    enclosing 200 times the critical density at ``z_lens``).  ``concentration=None`` uses
    :func:`duffy_concentration`.  ``rho_s = (200/3) rho_cr c^3 / (ln(1 + c) - c / (1 + c))``
    (Navarro, Frenk & White 1997), ``kappa_s = rho_s r_s / Sigma_cr``."""
    if concentration is None:
        concentration = duffy_concentration(m200, z_lens, cosmo.h)
    rho_cr = cosmo.critical_density(z_lens).to(u.M_sun / u.Mpc**3)
    r200 = (3.0 * m200 * u.M_sun / (4.0 * math.pi * 200.0 * rho_cr)) ** (1.0 / 3.0)
    r_s = r200 / concentration
    c = concentration
    rho_s = 200.0 / 3.0 * rho_cr * c**3 / (math.log(1.0 + c) - c / (1.0 + c))
    kappa_s = float((rho_s * r_s / critical_surface_density(cosmo, z_lens, z_source)).decompose())
    d_l = cosmo.angular_diameter_distance(z_lens)
    return kappa_s, float((r_s / d_l).decompose()) * ARCSEC_PER_RADIAN


def distance_ratio(cosmo, z_lens: float, z_source: float) -> float:
    """``D_ls / D_s`` (angular-diameter distances), 0 when the source is not behind the lens."""
    if z_source <= z_lens:
        return 0.0
    try:  # astropy >= 8: two-redshift form
        d_ls = cosmo.angular_diameter_distance(z_lens, z_source)
    except TypeError:  # older astropy
        d_ls = cosmo.angular_diameter_distance_z1z2(z_lens, z_source)
    d_s = cosmo.angular_diameter_distance(z_source)
    return float((d_ls / d_s).decompose())


def einstein_radius_sis(velocity_dispersion: float, z_lens: float, z_source: float, cosmo) -> float:
    """Einstein radius (arcsec) of a singular isothermal sphere,

        theta_E = 4 pi (sigma / c)^2 D_ls / D_s

    (Schneider, Ehlers & Falco 1992, eq. 8.36); ``velocity_dispersion`` in km/s.
    The SIE of :class:`simlens.mass.SIE` has the same Einstein radius for the same sigma."""
    ratio = distance_ratio(cosmo, z_lens, z_source)
    return 4.0 * math.pi * (velocity_dispersion / _C_KM_S) ** 2 * ratio * ARCSEC_PER_RADIAN
