"""Quasar variability as a damped random walk (Kelly, Bechtold & Siemiginowska 2009).

The magnitude's departure from its mean is an Ornstein-Uhlenbeck process of time scale tau and
stationary variance SF_inf^2 / 2, so that the structure function (the rms of magnitude differences)
is ``SF(dt) = SF_inf (1 - exp(-|dt| / tau))^1/2``.  It is sampled exactly at any set of times:
``x_{k+1} = x_k e^{-dt/tau} + sigma (1 - e^{-2 dt/tau})^1/2 N(0, 1)``.

Tau and SF_inf follow MacLeod et al. (2010, ApJ 721, 1014, their eq. 7 and table 1; coefficients
from memory):

    log10 f = A + B log10(lambda_rest / 400 nm) + C (M_i + 23) + D log10(M_BH / 1e9 M_sun) + E log10(1 + z)

with (A, B, C, D, E) = (-0.51, -0.479, 0.131, 0.18, 0) for SF_inf (mag) and (2.4, 0.17, 0.03,
0.21, 0) for tau (rest-frame days).  The bands vary together: one walk, tau at the reference
band's rest wavelength (B = 0.17 makes tau change by 6 % from g to i), each band's amplitude from
its own rest wavelength (bluer bands vary more); the observed time scale is (1 + z) tau.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

__all__ = ["MACLEOD_SF_INF", "MACLEOD_TAU", "MacLeodRelation", "DampedRandomWalk", "structure_function"]


@dataclass(frozen=True)
class MacLeodRelation:
    """``log10 f = A + B log10(lambda_rest/400 nm) + C (M_i + 23) + D log10(M_BH/1e9) + E log10(1+z)``."""

    a: float
    b: float
    c: float
    d: float
    e: float

    def __call__(self, rest_wavelength_nm, absolute_magnitude_i: float, log_black_hole_mass: float, z: float):
        log_f = (self.a + self.b * np.log10(np.asarray(rest_wavelength_nm, dtype=float) / 400.0)
                 + self.c * (absolute_magnitude_i + 23.0) + self.d * (log_black_hole_mass - 9.0)
                 + self.e * math.log10(1.0 + z))
        return 10.0 ** log_f


MACLEOD_SF_INF = MacLeodRelation(-0.51, -0.479, 0.131, 0.18, 0.0)  # mag
MACLEOD_TAU = MacLeodRelation(2.4, 0.17, 0.03, 0.21, 0.0)  # rest-frame days


def structure_function(dt, sf_inf: float, tau: float):
    """``SF(dt) = SF_inf (1 - exp(-|dt|/tau))^1/2`` of a damped random walk."""
    return sf_inf * np.sqrt(1.0 - np.exp(-np.abs(np.asarray(dt, dtype=float)) / tau))


@dataclass(frozen=True)
class DampedRandomWalk:
    """A quasar's light curve: mean AB magnitudes per band, one walk of observer-frame time scale
    ``tau`` (days) scaled per band by ``sf_inf`` (mag), realised from ``seed``.  The walk starts
    from its stationary distribution at the earliest time asked for, so it is a function of the
    set of times asked together (ask for all of a system's times at once)."""

    mean_magnitudes: tuple  # ((band, mag), ...)
    sf_inf: tuple  # ((band, mag), ...)
    tau: float  # observer-frame days
    seed: int

    def walk(self, times) -> np.ndarray:
        """The unit walk (stationary variance 1/2, so that SF_inf times it has SF_inf^2 / 2) at ``times``."""
        t = np.asarray(times, dtype=float)
        order = np.argsort(t, kind="stable")
        ts = t[order]
        rng = np.random.default_rng(self.seed)
        normal = rng.standard_normal(ts.size)
        sigma = math.sqrt(0.5)
        x = np.empty(ts.size)
        if ts.size:
            x[0] = sigma * normal[0]
            decay = np.exp(-np.diff(ts) / self.tau)
            kick = sigma * np.sqrt(1.0 - decay**2) * normal[1:]
            for k in range(1, ts.size):  # a recursion; a system has at most a few thousand times
                x[k] = x[k - 1] * decay[k - 1] + kick[k - 1]
        out = np.empty(ts.size)
        out[order] = x
        return out

    def magnitudes_at(self, times) -> dict[str, np.ndarray]:
        x = self.walk(times)
        sf = dict(self.sf_inf)
        return {band: mean + sf[band] * x for band, mean in self.mean_magnitudes}
