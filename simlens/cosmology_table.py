"""Fast cosmological distances for sampling: astropy once, then interpolation.

Drawing a system needs several distances (lens, source, lens-to-source, luminosity distance,
comoving volume).  astropy computes each by quadrature, about 100 microseconds a call; a population
of 10^5 systems with rejection sampling makes millions of calls.  :class:`DistanceTable` evaluates
astropy's comoving distance and ``E(z)`` once on a fine redshift grid and interpolates them with
cubic splines sampled on a fine grid (relative error below 2e-6, tested against astropy in tests/test_populations.py).
Two-redshift distances follow from the transverse comoving distances (Hogg 1999, eq. 19; valid for
``Omega_k >= 0`` and for closed models before the antipode).
"""

from __future__ import annotations

import math

import astropy.units as u
import numpy as np
from astropy import constants
from scipy.interpolate import CubicSpline

__all__ = ["DistanceTable", "SECONDS_PER_DAY", "MPC_IN_KM"]

C_KM_S = constants.c.to_value(u.km / u.s)
MPC_IN_KM = u.Mpc.to(u.km)
SECONDS_PER_DAY = 86400.0
_ARCSEC = math.pi / (180.0 * 3600.0)


class DistanceTable:
    """Distances of one astropy cosmology (Mpc), interpolated on ``0 <= z <= z_max``.

    >>> table = DistanceTable(Planck18)
    >>> table.angular_diameter(1.0), table.between(0.5, 2.0), table.ratio(0.5, 2.0)
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

    def redshift_at_comoving(self, distance):
        """The redshift at line-of-sight comoving distance ``distance`` (Mpc): the inverse of D_C."""
        return np.interp(distance, self._comoving_table, self._z)

    def _efunc(self, z):
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

    def comoving(self, z):
        """Line-of-sight comoving distance D_C (Mpc)."""
        return self._comoving(self._check(z))

    def transverse_comoving(self, z):
        """Transverse comoving distance D_M (Mpc) (Hogg 1999, eq. 16)."""
        return self._transverse(self.comoving(z))

    def _transverse(self, d_c):
        ok, dh = self.omega_k, self.hubble_distance
        if ok > 0:
            return dh / math.sqrt(ok) * np.sinh(math.sqrt(ok) * d_c / dh)
        if ok < 0:
            return dh / math.sqrt(-ok) * np.sin(math.sqrt(-ok) * d_c / dh)
        return d_c

    def angular_diameter(self, z):
        z = self._check(z)
        return self.transverse_comoving(z) / (1.0 + z)

    def luminosity(self, z):
        z = self._check(z)
        return self.transverse_comoving(z) * (1.0 + z)

    def distance_modulus(self, z):
        return 5.0 * np.log10(self.luminosity(z) * 1e5)  # D_L in units of 10 pc

    def between(self, z1, z2):
        """Angular-diameter distance from ``z1`` to ``z2 > z1`` (Mpc; Hogg 1999, eq. 19)."""
        z2 = self._check(z2)
        m1, m2 = self.transverse_comoving(z1), self.transverse_comoving(z2)
        k = self.omega_k / self.hubble_distance**2
        d12 = m2 * np.sqrt(1.0 + k * m1**2) - m1 * np.sqrt(1.0 + k * m2**2)
        return d12 / (1.0 + z2)

    def ratio(self, z_lens, z_source):
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
        return self.hubble_distance * self.transverse_comoving(z) ** 2 / self._efunc(z)

    def time_delay_distance(self, z_lens, z_source):
        """``(1 + z_l) D_l D_s / D_ls`` (Mpc)."""
        d_l, d_s = self.angular_diameter(z_lens), self.angular_diameter(z_source)
        return (1.0 + np.asarray(z_lens)) * d_l * d_s / self.between(z_lens, z_source)

    def fermat_to_days(self, z_lens, z_source):
        """Days of delay per arcsec^2 of Fermat potential: ``(1 + z_l)/c D_l D_s/D_ls`` (rad^2); a
        float for scalar redshifts, else an array."""
        days = self.time_delay_distance(z_lens, z_source) * MPC_IN_KM / C_KM_S * _ARCSEC**2 / SECONDS_PER_DAY
        return float(days) if np.ndim(days) == 0 else days
