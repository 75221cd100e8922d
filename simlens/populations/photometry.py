"""Colours by physics: spectral templates at a redshift through the survey's filter curves.

A :class:`Filter` is a throughput curve: one that GalSim ships (``"LSST_r"``, ``"ACS_wfc_F814W"``,
...) or a two-column text file (wavelength in nm, throughput).  A :class:`Template` is a rest-frame
spectral energy distribution ``f_lambda``: GalSim's Coleman, Wu & Weedman (1980) templates (extended
by Bolzonella et al. 2000), a power law ``f_nu ~ nu^alpha`` for quasar continua, or a black body
for stars.

Magnitudes are AB and photon-counting (the detector counts photons):

    m = -2.5 log10( int f_lambda(lambda) T(lambda) lambda dlambda / int f^AB_lambda T lambda dlambda ),
    f^AB_lambda = 3631 Jy c / lambda^2.

A galaxy at redshift z with absolute magnitude M in a rest-frame filter R has in the observed filter
Q ``m_Q = M + DM(z) + K_QR(z)``, with the K-correction (Hogg et al. 2002, arXiv:astro-ph/0210394,
eq. 8 in f_lambda form)

    K_QR = -2.5 log10[ (1/(1+z)) int f(lambda/(1+z)) T_Q lambda dlambda / int f^AB T_Q lambda dlambda
                       * int f^AB T_R lambda dlambda / int f(lambda) T_R lambda dlambda ].

:class:`KCorrection` tabulates K on a redshift grid once per (template, filter) so that sampling a
population costs an interpolation.  Colours are checked against GalSim's own
``SED.calculateMagnitude`` in tests/test_populations.py.
"""

from __future__ import annotations

import math
import os
from dataclasses import dataclass
from functools import lru_cache
from pathlib import Path

import numpy as np
from scipy.integrate import trapezoid as _trapezoid
from ..errors import clip

__all__ = ["Filter", "Template", "KCorrection", "kcorrection", "TEMPLATES", "load_filter", "ab_magnitude_offset",
           "galsim_filter_names"]

_C_NM_S = 2.99792458e17  # speed of light in nm/s
_AB_FNU = 3631e-23  # erg/s/cm^2/Hz
_HC_OVER_K_NM_K = 1.438776877e7  # h c / k_B in nm K (second radiation constant, CODATA 2018)

# Named templates: GalSim's CWW files, and a quasar continuum.
TEMPLATES = {
    "elliptical": "CWW_E_ext.sed",
    "spiral": "CWW_Sbc_ext.sed",
    "late_spiral": "CWW_Scd_ext.sed",
    "irregular": "CWW_Im_ext.sed",
}
QUASAR_SPECTRAL_INDEX = -0.44  # f_nu ~ nu^-0.44: Vanden Berk et al. (2001) composite continuum (from memory)


def _share_dir() -> Path:
    import galsim

    return Path(galsim.meta_data.share_dir)


def galsim_filter_names() -> tuple[str, ...]:
    folder = _share_dir() / "bandpasses"
    return tuple(sorted(p.stem for p in folder.glob("*.dat")))


@dataclass(frozen=True, eq=False)
class Filter:
    """A filter curve on a wavelength grid (nm)."""

    name: str
    wavelength: np.ndarray
    throughput: np.ndarray

    @property
    def mean_wavelength(self) -> float:
        """The throughput-weighted mean wavelength (nm), ``int lambda T dlambda / int T dlambda``."""
        return float(_trapezoid(self.wavelength * self.throughput, self.wavelength)
                     / _trapezoid(self.throughput, self.wavelength))


@lru_cache(maxsize=64)
def load_filter(spec: str, base_folder: str = ".") -> Filter:
    """A GalSim filter by name (``"LSST_r"``) or a text file (``nm  throughput`` per line)."""
    if spec in galsim_filter_names():
        path = _share_dir() / "bandpasses" / f"{spec}.dat"
    else:
        path = Path(spec) if os.path.isabs(spec) else Path(base_folder) / spec
        if not path.is_file():
            raise FileNotFoundError(f"filter {clip(repr(spec))}: no GalSim filter of that name "
                                    f"({', '.join(galsim_filter_names())}) and no file {clip(str(path), 200)}")
    try:
        data = np.loadtxt(path, comments="#", ndmin=2)
    except (ValueError, UnicodeDecodeError):
        # never quote the file: it may be any file the recipe names
        raise ValueError(f"filter file {clip(str(path), 200)}: not two columns of numbers (nm, throughput) "
                         f"on every line") from None
    if data.ndim != 2 or data.shape[1] < 2 or data.shape[0] < 3:
        raise ValueError(f"filter file {path}: expected two columns (nm, throughput), got shape {data.shape}")
    wavelength, throughput = data[:, 0], np.clip(data[:, 1], 0.0, None)
    if np.any(np.diff(wavelength) <= 0):
        raise ValueError(f"filter file {path}: wavelengths must increase")
    return Filter(name=str(spec), wavelength=wavelength, throughput=throughput)


@dataclass(frozen=True, eq=False)
class Template:
    """A rest-frame ``f_lambda`` shape (arbitrary normalisation) as a function of nm."""

    name: str
    wavelength: np.ndarray | None = None  # nm; None for a power law
    flux: np.ndarray | None = None
    spectral_index: float | None = None  # f_nu ~ nu^index (power law)

    @classmethod
    def named(cls, name: str) -> "Template":
        return _named_template(name)

    @classmethod
    def power_law(cls, spectral_index: float = QUASAR_SPECTRAL_INDEX) -> "Template":
        return cls(name=f"power_law({spectral_index:g})", spectral_index=float(spectral_index))

    @classmethod
    def black_body(cls, temperature: float) -> "Template":
        """Planck's law, ``f_lambda ~ lambda^-5 / (exp(hc / lambda k T) - 1)``, sampled every 1 nm
        from 90 to 3000 nm (the colours of stars in the field images)."""
        lam = np.arange(90.0, 3000.0 + 0.5, 1.0)
        x = _HC_OVER_K_NM_K / (lam * float(temperature))
        return cls(name=f"black_body({temperature:g} K)", wavelength=lam, flux=lam**-5.0 / np.expm1(x))

    def f_lambda(self, wavelength_nm) -> np.ndarray:
        lam = np.asarray(wavelength_nm, dtype=float)
        if self.spectral_index is not None:
            # f_lambda = f_nu c / lambda^2 ~ lambda^(-index - 2)
            return (lam / 500.0) ** (-self.spectral_index - 2.0)
        return np.interp(lam, self.wavelength, self.flux, left=0.0, right=0.0)


@lru_cache(maxsize=16)
def _named_template(name: str) -> Template:
    if name not in TEMPLATES:
        raise KeyError(f"unknown template {name!r}; simlens knows {', '.join(sorted(TEMPLATES))}")
    data = np.loadtxt(_share_dir() / "SEDs" / TEMPLATES[name], comments="#")
    return Template(name=name, wavelength=data[:, 0] / 10.0, flux=data[:, 1])  # Angstrom -> nm


def _integration_grid(template: Template, filt: Filter, redshift: float) -> np.ndarray:
    """The filter's wavelengths together with the redshifted template's inside the filter: linear
    interpolation of both is then exact between grid points (as GalSim integrates)."""
    if template.wavelength is None:
        return np.union1d(filt.wavelength, np.linspace(filt.wavelength[0], filt.wavelength[-1], 2001))
    shifted = template.wavelength * (1.0 + redshift)
    inside = shifted[(shifted > filt.wavelength[0]) & (shifted < filt.wavelength[-1])]
    return np.union1d(filt.wavelength, inside)


def _ab_integral(filt: Filter) -> float:
    f_ab = _AB_FNU * _C_NM_S / filt.wavelength**2
    return float(_trapezoid(f_ab * filt.throughput * filt.wavelength, filt.wavelength))


def ab_magnitude_offset(template: Template, filt: Filter, redshift: float = 0.0) -> float:
    """AB magnitude of the template (in its own units) redshifted to ``redshift`` and seen through
    ``filt``, without the distance: ``-2.5 log10[(1/(1+z)) int f(lambda/(1+z)) T lambda dlambda / AB]``.
    Differences between filters are colours."""
    lam = _integration_grid(template, filt, redshift)
    throughput = np.interp(lam, filt.wavelength, filt.throughput)
    rest = template.f_lambda(lam / (1.0 + redshift)) / (1.0 + redshift)
    integral = float(_trapezoid(rest * throughput * lam, lam))
    if not integral > 0:
        raise ValueError(f"template {template.name} has no flux in filter {filt.name} at z = {redshift:g}")
    return -2.5 * math.log10(integral / _ab_integral(filt))


class KCorrection:
    """``K_QR(z)`` of one template from rest-frame filter R to observed filter Q, tabulated on
    ``0 <= z <= z_max`` (step 0.005, a cubic spline, evaluated by linear interpolation on a 20x finer
    grid)."""

    def __init__(self, template: Template, observed: Filter, rest: Filter, z_max: float = 7.0):
        from scipy.interpolate import CubicSpline

        self.template, self.observed, self.rest = template, observed, rest
        z = np.arange(0.0, z_max + 1e-9, 0.005)
        zero = ab_magnitude_offset(template, rest, 0.0)
        k = np.array([ab_magnitude_offset(template, observed, zi) - zero for zi in z])
        self.z_max = float(z[-1])
        self._z = np.linspace(0.0, self.z_max, 20 * z.size)  # the spline, sampled for np.interp
        self._k = CubicSpline(z, k)(self._z)

    def __call__(self, z):
        if np.ndim(z) == 0:
            if not 0.0 <= z <= self.z_max:
                raise ValueError(f"K-correction table covers 0 <= z <= {self.z_max:g}; got {z}")
            return float(np.interp(z, self._z, self._k))
        z = np.asarray(z, dtype=float)
        if np.any(z < 0) or np.any(z > self.z_max):
            raise ValueError(f"K-correction table covers 0 <= z <= {self.z_max:g}; got {z}")
        return np.interp(z, self._z, self._k)


@lru_cache(maxsize=128)
def kcorrection(template_name: str, observed: str, rest: str, base_folder: str = ".",
                spectral_index: float | None = None) -> KCorrection:
    """A cached :class:`KCorrection` (one per template, observed filter and rest filter; a power law
    when ``spectral_index`` is given)."""
    template = Template.power_law(spectral_index) if spectral_index is not None else Template.named(template_name)
    return KCorrection(template, load_filter(observed, base_folder), load_filter(rest, base_folder))
