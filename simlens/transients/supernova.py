"""Type Ia supernovae: a spectral time series redshifted through the survey's filters.

A :class:`SpectralTimeSeries` is a rest-frame ``f_lambda(phase, wavelength)`` (phase in days from
the rest-frame B maximum).  A supernova at redshift z, stretch s and peak absolute magnitude M
(AB, rest-frame B at maximum) has in the observed band Q at observer time t

    m_Q(t) = M + DM(z) + O_Q(p, z) - O_B(0, 0),      p = (t - t_peak) / ((1 + z) s),

with ``O_Q(p, z) = -2.5 log10[(1/(1+z)) int f(p, lambda/(1+z)) T_Q(lambda) lambda dlambda / AB_Q]``
the photon-counting AB magnitude of the redshifted spectrum (:func:`simlens.populations.photometry.
ab_magnitude_offset`), so the K-correction (Hogg et al. 2002) and the (1 + z) time dilation follow
from the spectrum; the stretch widens the time axis (Perlmutter et al. 1997) and sets the peak by
the stretch-luminosity relation ``M = M_0 - alpha (s - 1)`` (alpha about 1.5: Perlmutter et al.
1997, Goldhaber et al. 2001, from memory).  Rest-frame B is GalSim's ACS F435W curve.

The built-in spectrum (:meth:`SpectralTimeSeries.simplified_ia`) is simplified: a black body
whose temperature falls from about 10,000 K at maximum to 5,000 K a month later, suppressed below
380 nm (the line blanketing of Ia spectra), scaled so that its rest-frame B light curve follows a
smooth template with a rise of 18 days from explosion (Riess et al. 1999 and Hayden et al. 2010
give 17-19.5 days), Delta m_15(B) = 1.1 (a normal Ia, Phillips 1993), 2.0 mag at +30 days and
0.014 mag/day at +60 to +100 days (figures from memory).  Its colours are those of the black body,
right only to about 0.1-0.3 mag; no spectral lines, no second infrared maximum.  Give a measured
spectral time series (``source.supernova.spectra``) where colours matter, or light curves in the
survey's own bands (``source.supernova.light_curves``, :class:`BandLightCurves`: magnitude
offsets from the peak absolute magnitude; the time axis still dilated by (1 + z) s, no
K-correction but the table's).
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..populations.photometry import Filter, _ab_integral, _HC_OVER_K_NM_K, load_filter

__all__ = ["SpectralTimeSeries", "BandLightCurves", "SupernovaModel", "TabulatedLightCurve", "REST_FRAME_B",
           "stretched_peak_magnitude"]

REST_FRAME_B = "ACS_wfc_F435W"  # GalSim's curve standing in for Johnson B

# The built-in template's B light curve (fitted to the figures of the module docstring).
RISE_DAYS = 18.0
RISE_POWER = 1.5  # flux ~ (1 - (p/RISE_DAYS)^2)^1.5 before maximum: ~ t^1.5 after explosion
DECLINE_WIDTH = 8.782  # days: Gaussian core of the decline
DECLINE_TAIL_SHARE = 0.1793
DECLINE_TAIL_DAYS = 48.17
LAST_PHASE = 150.0  # days after maximum covered by the built-in template
BLANKETING_NM, BLANKETING_POWER = 380.0, 10.0


def template_b_flux(phase) -> np.ndarray:
    """The built-in template's rest-frame B flux relative to maximum, at rest-frame ``phase`` (days)."""
    p = np.asarray(phase, dtype=float)
    rise = np.clip(1.0 - (p / RISE_DAYS) ** 2, 0.0, None) ** RISE_POWER
    x = np.clip(p, 0.0, None) / DECLINE_TAIL_DAYS
    decline = ((1.0 - DECLINE_TAIL_SHARE) * np.exp(-0.5 * (np.clip(p, 0.0, None) / DECLINE_WIDTH) ** 2)
               + DECLINE_TAIL_SHARE * (1.0 + x) * np.exp(-x))
    return np.where(p < -RISE_DAYS, 0.0, np.where(p < 0.0, rise, decline))


def template_temperature(phase) -> np.ndarray:
    """The built-in template's colour temperature (K) at rest-frame ``phase``."""
    return 4500.0 + 6000.0 / (1.0 + np.exp((np.asarray(phase, dtype=float) - 15.0) / 6.0))


@dataclass(frozen=True, eq=False)
class SpectralTimeSeries:
    """Rest-frame ``flux[phase, wavelength]`` (f_lambda, any units), phases in days from the
    rest-frame B maximum, wavelengths in nm, both increasing."""

    name: str
    phase: np.ndarray
    wavelength: np.ndarray
    flux: np.ndarray

    def __post_init__(self):
        if self.flux.shape != (self.phase.size, self.wavelength.size):
            raise ValueError(f"spectral time series {self.name}: flux of shape {self.flux.shape}, expected "
                             f"(phases, wavelengths) = ({self.phase.size}, {self.wavelength.size})")
        if np.any(np.diff(self.phase) <= 0) or np.any(np.diff(self.wavelength) <= 0):
            raise ValueError(f"spectral time series {self.name}: phases and wavelengths must increase")
        if not np.all(np.isfinite(self.flux)) or np.any(self.flux < 0):
            raise ValueError(f"spectral time series {self.name}: fluxes must be finite and >= 0")

    @classmethod
    def simplified_ia(cls) -> "SpectralTimeSeries":
        """The built-in simplified Ia spectrum (see the module docstring), every 1 nm from 100 to
        2500 nm and every day from -18 to +150."""
        phase = np.arange(-RISE_DAYS, LAST_PHASE + 0.5, 1.0)
        lam = np.arange(100.0, 2500.0 + 0.5, 1.0)
        temperature = template_temperature(phase)[:, None]
        planck = lam**-5.0 / np.expm1(_HC_OVER_K_NM_K / (lam * temperature))
        shape = planck / (1.0 + (BLANKETING_NM / lam) ** BLANKETING_POWER)
        b = load_filter(REST_FRAME_B)
        b_flux = shape @ _band_weights(lam, b, 0.0)  # each phase's B flux (photon counting)
        flux = shape * (template_b_flux(phase) / b_flux)[:, None]
        return cls(name="simplified Ia (built in)", phase=phase, wavelength=lam, flux=flux)

    @classmethod
    def from_file(cls, path: str | Path) -> "SpectralTimeSeries":
        """A table of ``phase_day  wavelength_nm  f_lambda`` lines (``#`` comments), every phase
        with the same wavelengths: the layout of published spectral time series."""
        try:
            data = np.loadtxt(path, comments="#", ndmin=2)
        except (OSError, ValueError, UnicodeDecodeError) as exc:
            raise ValueError(f"spectral time series {path}: not three columns of numbers "
                             f"(phase in days, wavelength in nm, f_lambda) on every line ({type(exc).__name__})") from None
        if data.shape[1] < 3:
            raise ValueError(f"spectral time series {path}: expected three columns, got {data.shape[1]}")
        phase, inverse = np.unique(data[:, 0], return_inverse=True)
        lam = np.unique(data[:, 1])
        if phase.size * lam.size != data.shape[0]:
            raise ValueError(f"spectral time series {path}: each of its {phase.size} phases needs all "
                             f"{lam.size} wavelengths, once each")
        order = np.lexsort((data[:, 1], data[:, 0]))
        flux = data[order, 2].reshape(phase.size, lam.size)
        return cls(name=str(path), phase=phase, wavelength=lam, flux=flux)

    def band_magnitudes(self, filters: dict[str, Filter], z: float) -> dict[str, np.ndarray]:
        """``band -> O_Q(phase, z)`` at every phase of the series (inf where no light)."""
        out = {}
        for band, filt in filters.items():
            with np.errstate(divide="ignore"):
                integral = self.flux @ _band_weights(self.wavelength, filt, z)
                out[band] = -2.5 * np.log10(np.clip(integral, 0.0, None) / _ab_integral(filt))
        return out


def _band_weights(rest_nm: np.ndarray, filt: Filter, z: float) -> np.ndarray:
    """Weights ``w`` such that ``flux @ w`` is ``(1/(1+z)) int f(lambda/(1+z)) T lambda dlambda``
    for spectra sampled at ``rest_nm``: with lambda = (1+z) lambda_rest that is
    ``(1+z) int f(lambda_rest) T((1+z) lambda_rest) lambda_rest dlambda_rest`` (trapezoid rule)."""
    observed = rest_nm * (1.0 + z)
    throughput = np.interp(observed, filt.wavelength, filt.throughput, left=0.0, right=0.0)
    step = np.gradient(rest_nm)  # trapezoid weights on a non-uniform grid
    step[0], step[-1] = 0.5 * (rest_nm[1] - rest_nm[0]), 0.5 * (rest_nm[-1] - rest_nm[-2])
    return (1.0 + z) * throughput * rest_nm * step


@dataclass(frozen=True)
class TabulatedLightCurve:
    """An unlensed source's AB magnitudes at observer times (MJD) ``times``, one tuple per band;
    between the times by linear interpolation in flux, outside them no light."""

    times: tuple
    magnitudes: tuple  # ((band, (mag, ...)), ...)

    def magnitudes_at(self, times) -> dict[str, np.ndarray]:
        t = np.asarray(times, dtype=float)
        grid = np.asarray(self.times)
        out = {}
        for band, mags in self.magnitudes:
            flux = 10.0 ** (-0.4 * np.asarray(mags, dtype=float))
            value = np.interp(t, grid, flux, left=0.0, right=0.0)
            with np.errstate(divide="ignore"):
                out[band] = -2.5 * np.log10(value)
        return out


@dataclass(frozen=True, eq=False)
class BandLightCurves:
    """A user's light curves in the survey's bands: ``offsets[band]`` (mag) added to the peak
    absolute magnitude at rest-frame ``phase`` (days from maximum), as the survey sees a
    supernova (its K-corrections, if any, are the table's: no spectrum is redshifted)."""

    name: str
    phase: np.ndarray
    offsets: dict

    @classmethod
    def from_file(cls, path: str | Path, bands) -> "BandLightCurves":
        """A table of ``phase_day  band  magnitude_offset`` lines (``#`` comments), every band of
        ``bands``; each band's offsets are interpolated linearly onto the union of the phases
        (no light outside its own)."""
        rows = {}
        try:
            lines = Path(path).read_text(encoding="utf-8").splitlines()
        except (OSError, UnicodeDecodeError) as exc:
            raise ValueError(f"light-curve table {path}: cannot be read ({type(exc).__name__})") from None
        for number, line in enumerate(lines, 1):
            words = line.split("#", 1)[0].split()
            if not words:
                continue
            try:
                if len(words) != 3:
                    raise ValueError
                phase, offset = float(words[0]), float(words[2])
                if not (np.isfinite(phase) and np.isfinite(offset)):
                    raise ValueError
            except ValueError:
                raise ValueError(f"light-curve table {path} line {number}: not 'phase_day band magnitude_offset'") from None
            rows.setdefault(words[1], []).append((phase, offset))
        missing = [b for b in bands if b not in rows or len(rows[b]) < 2]
        if missing:
            raise ValueError(f"light-curve table {path}: band {missing[0]!r} needs two phases at least")
        grid = np.unique(np.concatenate([[p for p, _ in rows[b]] for b in bands]))
        offsets = {}
        for b in bands:
            p, m = np.array(sorted(rows[b])).T
            if np.any(np.diff(p) <= 0):
                raise ValueError(f"light-curve table {path}: band {b!r} repeats a phase")
            flux = np.interp(grid, p, 10 ** (-0.4 * m), left=0.0, right=0.0)
            with np.errstate(divide="ignore"):
                offsets[b] = -2.5 * np.log10(flux)
        return cls(name=str(path), phase=grid, offsets=offsets)


class SupernovaModel:
    """Light curves of type Ia supernovae in a survey's bands: from a spectral time series
    redshifted through the filters, or from a user's :class:`BandLightCurves`."""

    def __init__(self, spectra: SpectralTimeSeries | BandLightCurves, filters: dict[str, Filter]):
        self.spectra, self.filters = spectra, dict(filters)
        self._rest_b_peak = 0.0
        if isinstance(spectra, SpectralTimeSeries):
            peak = int(np.argmin(np.abs(spectra.phase)))
            self._rest_b_peak = float(spectra.band_magnitudes({"B": load_filter(REST_FRAME_B)}, 0.0)["B"][peak])

    def _offsets(self, z: float) -> dict:
        if isinstance(self.spectra, BandLightCurves):
            return self.spectra.offsets
        return {b: m - self._rest_b_peak for b, m in self.spectra.band_magnitudes(self.filters, z).items()}

    def light_curve(self, z: float, stretch: float, peak_absolute_magnitude: float, distance_modulus: float,
                    peak_time: float) -> TabulatedLightCurve:
        """The supernova's magnitudes in every band at the observer times of the series' phases
        (``peak_time + (1 + z) s phase``)."""
        base = peak_absolute_magnitude + distance_modulus
        times = peak_time + (1.0 + z) * stretch * self.spectra.phase
        return TabulatedLightCurve(times=tuple(float(t) for t in times),
                                   magnitudes=tuple((b, tuple(float(m) for m in base + o))
                                                    for b, o in self._offsets(z).items()))


def stretched_peak_magnitude(m0: float, stretch: float, alpha: float) -> float:
    """``M = M_0 - alpha (s - 1)``: broader supernovae are brighter (Perlmutter et al. 1997)."""
    return m0 - alpha * (stretch - 1.0)

