"""Cosmology: the physical constants, the recipe's astropy cosmology, lensing distances.

Uses astropy.cosmology: a named realisation (``Planck18``, ``WMAP9``, ...) or explicit parameters.
Drawing systems needs millions of distances; astropy computes each by quadrature (about 100
microseconds a call), so :class:`DistanceTable` evaluates astropy's comoving distance and ``E(z)``
once on a fine redshift grid and interpolates them (cubic splines sampled on a fine grid; relative
error below 2e-6, tested against astropy in tests/test_populations.py).  Two-redshift distances
follow from the transverse comoving distances (Hogg 1999, eq. 19; valid for ``Omega_k >= 0`` and
for closed models before the antipode).
"""

from __future__ import annotations

import math

import astropy.units as u
import numpy as np
from astropy import constants
from astropy import cosmology as astropy_cosmology
from scipy.interpolate import CubicSpline

__all__ = ["named_cosmology", "flat_or_curved_cosmology", "einstein_radius_sis", "sis_einstein_radius",
           "DistanceTable", "angular_diameter_distance_between", "critical_surface_density", "nfw_lens_parameters",
           "duffy_concentration", "ARCSEC_PER_RADIAN", "C_KM_S", "MPC_IN_KM", "SECONDS_PER_DAY"]

# -- constants (the only place simlens defines them) ----------------------------------------------
ARCSEC_PER_RADIAN = 180.0 * 3600.0 / math.pi
_RADIAN_PER_ARCSEC = 1.0 / ARCSEC_PER_RADIAN
C_KM_S = constants.c.to_value(u.km / u.s)  # speed of light, km/s
MPC_IN_KM = u.Mpc.to(u.km)
SECONDS_PER_DAY = 86400.0


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
    return float(sis_einstein_radius(velocity_dispersion, distance_ratio(cosmo, z_lens, z_source)))


def sis_einstein_radius(velocity_dispersion, distance_ratio):
    """``theta_E = 4 pi (sigma / c)^2 D_ls / D_s`` in arcsec (Schneider, Ehlers & Falco 1992, eq.
    8.36), on arrays: ``velocity_dispersion`` in km/s, ``distance_ratio`` = D_ls / D_s."""
    return 4.0 * math.pi * (np.asarray(velocity_dispersion) / C_KM_S) ** 2 * distance_ratio * ARCSEC_PER_RADIAN


class DistanceTable:
    """Distances of one astropy cosmology (Mpc), interpolated on ``0 <= z <= z_max``.

    The methods carry astropy.cosmology's names and meanings, but take and return plain floats or
    arrays (redshifts; distances in Mpc) instead of Quantities.

    >>> table = DistanceTable(Planck18)
    >>> table.angular_diameter_distance(1.0), table.angular_diameter_distance_z1z2(0.5, 2.0)
    >>> table.distance_ratio(0.5, 2.0)
    """

    GRID_POINTS = 2001  # astropy evaluations
    FINE_POINTS = 40001  # the spline through them, sampled for fast linear interpolation

    def __init__(self, cosmology, z_max: float = 12.0):
        self.cosmology = cosmology
        self.z_max = float(z_max)
        z = np.linspace(0.0, self.z_max, self.GRID_POINTS)
        fine = np.linspace(0.0, self.z_max, self.FINE_POINTS)
        self._z = fine
        self._comoving_table = CubicSpline(z, cosmology.comoving_distance(z).to_value(u.Mpc))(fine)
        self._efunc_table = CubicSpline(z, cosmology.efunc(z))(fine)
        self.hubble_distance = C_KM_S / cosmology.H0.to_value(u.km / u.s / u.Mpc)
        self.omega_k = float(cosmology.Ok0)

    def _comoving(self, z):
        return np.interp(z, self._z, self._comoving_table)

    def redshift_at_comoving_distance(self, distance):
        """The redshift at line-of-sight comoving distance ``distance`` (Mpc): the inverse of D_C."""
        return np.interp(distance, self._comoving_table, self._z)

    def efunc(self, z):
        return np.interp(z, self._z, self._efunc_table)

    def _check(self, z) -> np.ndarray:
        z = np.asarray(z, dtype=float)
        if z.ndim == 0:
            if not 0.0 <= float(z) <= self.z_max:
                raise ValueError(f"redshift {float(z):g} outside the distance table's range [0, {self.z_max:g}]")
            return z
        if np.any(z < 0) or np.any(z > self.z_max):
            raise ValueError(f"redshift outside the distance table's range [0, {self.z_max:g}]: "
                             f"{np.min(z):g}..{np.max(z):g}")
        return z

    def comoving_distance(self, z):
        """Line-of-sight comoving distance D_C (Mpc)."""
        return self._comoving(self._check(z))

    def comoving_transverse_distance(self, z):
        """Transverse comoving distance D_M (Mpc) (Hogg 1999, eq. 16)."""
        return self._transverse(self.comoving_distance(z))

    def _transverse(self, d_c):
        ok, dh = self.omega_k, self.hubble_distance
        if ok > 0:
            return dh / math.sqrt(ok) * np.sinh(math.sqrt(ok) * d_c / dh)
        if ok < 0:
            return dh / math.sqrt(-ok) * np.sin(math.sqrt(-ok) * d_c / dh)
        return d_c

    def angular_diameter_distance(self, z):
        z = self._check(z)
        return self.comoving_transverse_distance(z) / (1.0 + z)

    def luminosity_distance(self, z):
        z = self._check(z)
        return self.comoving_transverse_distance(z) * (1.0 + z)

    def distmod(self, z):
        return 5.0 * np.log10(self.luminosity_distance(z) * 1e5)  # D_L in units of 10 pc

    def angular_diameter_distance_z1z2(self, z1, z2):
        """Angular-diameter distance from ``z1`` to ``z2 > z1`` (Mpc; Hogg 1999, eq. 19)."""
        z2 = self._check(z2)
        m1, m2 = self.comoving_transverse_distance(z1), self.comoving_transverse_distance(z2)
        k = self.omega_k / self.hubble_distance**2
        d12 = m2 * np.sqrt(1.0 + k * m1**2) - m1 * np.sqrt(1.0 + k * m2**2)
        return d12 / (1.0 + z2)

    def distance_ratio(self, z_lens, z_source):
        """``D_ls / D_s``; 0 where the source is not behind the lens.  (For ``Omega_k = 0`` it is
        ``1 - D_C(z_l) / D_C(z_s)``; in general Hogg's eq. 19 over D_M(z_s).)"""
        z_lens, z_source = np.broadcast_arrays(self._check(z_lens), self._check(z_source))
        m1 = self._transverse(self._comoving(z_lens))
        m2 = self._transverse(self._comoving(z_source))
        k = self.omega_k / self.hubble_distance**2
        with np.errstate(divide="ignore", invalid="ignore"):
            out = np.where(z_source > z_lens,
                           (m2 * np.sqrt(1.0 + k * m1**2) - m1 * np.sqrt(1.0 + k * m2**2)) / m2, 0.0)
        return float(out) if out.ndim == 0 else out

    def differential_comoving_volume(self, z):
        """dV_C / dz / dOmega (Mpc^3 per steradian; Hogg 1999, eq. 28)."""
        z = self._check(z)
        return self.hubble_distance * self.comoving_transverse_distance(z) ** 2 / self.efunc(z)

    def time_delay_distance(self, z_lens, z_source):
        """``(1 + z_l) D_l D_s / D_ls`` (Mpc)."""
        d_l, d_s = self.angular_diameter_distance(z_lens), self.angular_diameter_distance(z_source)
        return (1.0 + np.asarray(z_lens)) * d_l * d_s / self.angular_diameter_distance_z1z2(z_lens, z_source)

    def fermat_to_days(self, z_lens, z_source):
        """Days of delay per arcsec^2 of Fermat potential: ``(1 + z_l)/c D_l D_s/D_ls`` (rad^2); a
        float for scalar redshifts, else an array."""
        days = self.time_delay_distance(z_lens, z_source) * MPC_IN_KM / C_KM_S * _RADIAN_PER_ARCSEC**2 / SECONDS_PER_DAY
        return float(days) if np.ndim(days) == 0 else days
