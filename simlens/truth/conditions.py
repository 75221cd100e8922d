"""Per-band observing conditions of one system, and the photometry that links magnitudes to counts.

Units: images are in ADU ("counts"); ``gain`` is electrons per ADU.  ``zero_point`` is the AB
magnitude of a source giving one electron per second, so over an exposure ``t``

    counts [ADU] = 10^(-0.4 (m - zero_point)) * t / gain
    MAGZERO      = zero_point + 2.5 log10(t / gain)      (m = MAGZERO - 2.5 log10(counts))

and the sky level per pixel is the same conversion of the sky surface brightness times the pixel
area (common practice for survey exposure-time calculators).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

__all__ = ["BandConditions"]


@dataclass(frozen=True)
class BandConditions:
    """One band's survey settings, as drawn for one system."""

    name: str
    pixel_scale: float  # arcsec / pixel
    zero_point: float  # AB mag giving 1 electron / s
    sky_brightness: float  # AB mag / arcsec^2
    exposure_time: float  # s
    gain: float  # electron / ADU
    read_noise: float  # electron / pixel
    psf_profile: str  # "moffat" | "kolmogorov"
    psf_fwhm: float  # arcsec
    psf_beta: float  # Moffat beta (unused for Kolmogorov)
    psf_g1: float = 0.0  # reduced shear of the PSF (area-preserving), along +x
    psf_g2: float = 0.0  # and along the diagonal
    # an optical PSF convolved in: (wavelength nm, diameter m, obscuration, Zernike coefficients in
    # waves for Noll 4-8 and 11), or () for none
    psf_optics: tuple = ()
    exposures: int = 1  # exposures summed into the image
    resampling: str = "none"  # their resampling kernel onto the image's grid (simlens.imaging.coadd)

    @property
    def magzero(self) -> float:
        """AB magnitude of one ADU in the whole exposure."""
        return self.zero_point + 2.5 * math.log10(self.exposure_time / self.gain)

    def counts_from_magnitude(self, magnitude: float) -> float:
        """Total counts (ADU) of a source of AB ``magnitude``."""
        return 10.0 ** (-0.4 * (magnitude - self.magzero))

    def magnitude_from_counts(self, counts: float) -> float:
        return self.magzero - 2.5 * math.log10(counts) if counts > 0 else math.inf

    @property
    def sky_level(self) -> float:
        """Sky counts per pixel (ADU) in the exposure; subtracted from the images, noise kept."""
        return self.counts_from_magnitude(self.sky_brightness) * self.pixel_scale**2

    @property
    def background_sigma(self) -> float:
        """Per-pixel noise (ADU) of an empty, sky-subtracted pixel: the CCD equation
        ``sqrt(sky * gain + read_noise^2) / gain`` (e.g. Howell 2006, Handbook of CCD Astronomy)."""
        return math.sqrt(self.sky_level * self.gain + self.read_noise**2) / self.gain
