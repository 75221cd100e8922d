"""Cosmology from a recipe, and the distance ratios that set lens strengths.

Uses astropy.cosmology: a named realisation (``Planck18``, ``WMAP9``, ...) or explicit parameters.
"""

from __future__ import annotations

import math

import astropy.units as u
from astropy import constants
from astropy import cosmology as astropy_cosmology

__all__ = ["named_cosmology", "flat_or_curved_cosmology", "einstein_radius_sis", "ARCSEC_PER_RADIAN"]

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
