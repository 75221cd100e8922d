"""The GalSim stage: PSF and pixel response, sky, CCD noise, per band.

For each band of a system:

1. The PSF (``galsim.Moffat`` or ``galsim.Kolmogorov`` of the band's FWHM) is drawn once with
   GalSim at the supersampled scale, without pixel response (``method='no_pixel'``), on a stamp of
   radius ``PSF_RADIUS_IN_FWHM`` FWHM.  It is *not* renormalised: the light beyond the stamp is
   dropped rather than pushed into the core (renormalising biased Kolmogorov cores by +0.3 %).
   Against GalSim drawing the same scene directly, the dropped wings cost 0.13 % of the flux for a
   Moffat beta = 3 and 0.22 % for a Kolmogorov PSF (tests/test_observe.py, bench/bench_psf_stage.py).
2. The scene (lens light + lensed source: the same PSF for both) is block-summed from the ray grid
   to the convolution grid (``convolution_sampling`` samples per pixel side, 2 by default: the PSF
   is smooth on that scale, and convolving there costs a quarter of the full ray grid), convolved
   with the PSF sampled on that grid by FFT, and block-summed to pixels, which integrates over each
   pixel, i.e. applies the pixel response.  Against GalSim drawing the same scenes directly this
   keeps flux and worst-pixel errors at the 1e-3 level (bench/bench_psf_stage.py).
3. The sky level (from the sky brightness, zero point and exposure) enters only through the noise
   (:func:`add_noise`): ``galsim.CCDNoise`` with ``sky_level`` adds Poisson noise of sky + signal
   and Gaussian read noise (gain in electrons per ADU), seeded per system and band, and leaves the
   image sky-subtracted.  A band with a ``resampling`` kernel gets a coadd's correlated noise of the
   same unresampled variance instead (:mod:`simlens.imaging.coadd`).

The PSF image written to files is the PSF integrated over the pixel (:func:`effective_psf_image`),
the effective PSF a user fits to stars in the image.
"""

from __future__ import annotations

import functools
import math
from dataclasses import dataclass

import galsim
import numpy as np
from scipy import fft as scipy_fft

from .coadd import coadd_kernel, coadd_noise
from .rays import Scene
from ..truth.conditions import BandConditions
from ..truth.psf import PSF_RADIUS_IN_FWHM, major_axis_fwhm, padding_for

__all__ = ["psf_profile", "psf_kernel", "major_axis_fwhm", "effective_psf_image", "ObservedBand", "observe_scene",
           "noiseless_pixels", "add_noise", "unresampled_variance", "padding_for", "PSF_RADIUS_IN_FWHM"]

CONVOLUTION_SAMPLING = 2  # samples per pixel side on which the PSF convolution runs
PSF_IMAGE_SIZE = 25  # pixels per side of the PSF image written with each cutout (odd: centred)


def psf_profile(band: BandConditions) -> galsim.GSObject:
    """The band's atmospheric+optical PSF as a GalSim profile (unit flux)."""
    if band.psf_profile == "moffat":
        profile = galsim.Moffat(beta=band.psf_beta, fwhm=band.psf_fwhm)
    elif band.psf_profile == "kolmogorov":
        profile = galsim.Kolmogorov(fwhm=band.psf_fwhm)
    else:
        raise ValueError(f"unknown PSF profile {band.psf_profile!r}; use 'moffat' or 'kolmogorov'")
    g1, g2 = band.psf_g1, band.psf_g2
    if g1 or g2:
        profile = profile.shear(g1=g1, g2=g2)
    return galsim.Convolve(profile, _optical_psf(band.psf_optics)) if band.psf_optics else profile


@functools.lru_cache(maxsize=16)
def _optical_psf(optics: tuple) -> galsim.GSObject:
    """GalSim's OpticalPSF of ``BandConditions.psf_optics`` (kept: building its pupil is the costly
    part, and a survey's optics do not change from system to system)."""
    wavelength, diameter, obscuration, defocus, astig1, astig2, coma1, coma2, spherical = optics
    aberrations = [0.0, 0.0, 0.0, 0.0, defocus, astig1, astig2, coma1, coma2, 0.0, 0.0, spherical]  # by Noll index
    return galsim.OpticalPSF(lam=wavelength, diam=diameter, obscuration=obscuration, aberrations=aberrations,
                             scale_unit=galsim.arcsec)


def convolution_sampling(supersampling: int) -> int:
    """Samples per pixel side for the convolution: CONVOLUTION_SAMPLING when it divides the ray
    grid's supersampling, else the ray grid itself."""
    return CONVOLUTION_SAMPLING if supersampling % CONVOLUTION_SAMPLING == 0 else supersampling


def _convolver(band: BandConditions, scale: float, shape, margin: int) -> "_FFTConvolver":
    """The convolution of images of ``shape`` (a side, or ``(rows, columns)``) with the band's PSF
    sampled every ``scale`` arcsec; the last few are kept, so that systems sharing a seeing share
    the PSF's transform."""
    shape = (shape, shape) if np.ndim(shape) == 0 else tuple(shape)
    psf = (band.psf_profile, band.psf_fwhm, band.psf_beta, band.psf_g1, band.psf_g2, band.psf_optics)
    return _shared_convolver(psf, scale, shape, margin)


@functools.lru_cache(maxsize=32)
def _shared_convolver(psf: tuple, scale: float, shape: tuple, margin: int) -> "_FFTConvolver":
    profile, fwhm, beta, g1, g2, optics = psf
    band = _PsfOnly(psf_profile=profile, psf_fwhm=fwhm, psf_beta=beta, psf_g1=g1, psf_g2=g2, psf_optics=optics)
    return _FFTConvolver(shape, psf_kernel(band, scale), exact_margin=margin)


# A compact component (a lensed source) is convolved on the box holding its light, widened by the
# kernel's reach, rather than on the whole padded field: the box holds every sample above
# LIGHT_BOX_THRESHOLD of the brightest, and is used only if the light outside it is at most
# LIGHT_BOX_LOSS of the total (else the whole field is convolved).  Box sides are rounded up to
# LIGHT_BOX_STEP samples, so that systems share the convolvers.
LIGHT_BOX_THRESHOLD = 1e-7
LIGHT_BOX_LOSS = 1e-6
LIGHT_BOX_STEP = 32


def _light_box(plane: np.ndarray, margin: int) -> tuple[slice, slice] | None:
    """The box of ``plane`` to convolve (see LIGHT_BOX_THRESHOLD), or None for the whole plane."""
    peak = float(plane.max())
    if not peak > 0:
        return None
    bright = plane > LIGHT_BOX_THRESHOLD * peak
    rows, cols = np.flatnonzero(bright.any(axis=1)), np.flatnonzero(bright.any(axis=0))
    box = []
    for hits, n in ((rows, plane.shape[0]), (cols, plane.shape[1])):
        if hits.size == 0:
            return None
        lo, hi = int(hits[0]) - margin, int(hits[-1]) + 1 + margin  # the light and the kernel's reach
        side = -(-(hi - lo) // LIGHT_BOX_STEP) * LIGHT_BOX_STEP
        if lo < 0 or hi > n or side >= n:  # (light near the field's edge would wrap into the box)
            return None
        start = min(max(lo - (side - (hi - lo)) // 2, 0), n - side)
        box.append(slice(start, start + side))
    total = float(plane.sum(dtype=np.float64))
    inside = float(plane[box[0], box[1]].sum(dtype=np.float64))
    return (box[0], box[1]) if total - inside <= LIGHT_BOX_LOSS * total else None


@dataclass(frozen=True)
class _PsfOnly:
    """The PSF fields of a band's conditions (what psf_profile and psf_kernel read)."""

    psf_profile: str
    psf_fwhm: float
    psf_beta: float
    psf_g1: float = 0.0
    psf_g2: float = 0.0
    psf_optics: tuple = ()


def psf_kernel(band: BandConditions, scale: float) -> np.ndarray:
    """The PSF sampled every ``scale`` arcsec on an odd stamp of radius PSF_RADIUS_IN_FWHM
    major-axis FWHM (sum = the PSF's flux within the stamp), centred on its central sample."""
    half = int(math.ceil(PSF_RADIUS_IN_FWHM * major_axis_fwhm(band) / scale))
    n = 2 * half + 1
    image = psf_profile(band).drawImage(nx=n, ny=n, scale=scale, method="no_pixel")
    return image.array.astype(float)


def _block_sum(image: np.ndarray, factor: int) -> np.ndarray:
    """Sums of ``factor x factor`` blocks (by strided slices: several times faster than a reshaped sum)."""
    if factor == 1:
        return image
    total = image[0::factor, 0::factor].copy()
    for i in range(factor):
        for j in range(factor):
            if i or j:
                total += image[i::factor, j::factor]
    return total


EFFECTIVE_PSF_SUBSAMPLING = 8


def effective_psf_image(band: BandConditions, size: int = PSF_IMAGE_SIZE) -> np.ndarray:
    """PSF convolved with the pixel, at the pixel scale, unit sum, centred on the central pixel.

    The PSF is drawn by GalSim at 1/8 pixel on a grid whose 8x8 blocks are the pixels, and each block
    is summed: the pixel integral by the midpoint rule.  It matches galsim.Convolve(psf, Pixel) drawn
    with tight GSParams to 1e-3 of the peak (tests/test_observe.py), at a fraction of its cost."""
    f = EFFECTIVE_PSF_SUBSAMPLING
    image = psf_profile(band).drawImage(nx=size * f, ny=size * f, scale=band.pixel_scale / f, method="no_pixel")
    array = image.array.astype(float).reshape(size, f, size, f).sum(axis=(1, 3))
    return array / array.sum()


class _FFTConvolver:
    """Circular convolution of images of one shape with one kernel, by real FFTs in single precision
    (the images are written as float32) at the next fast size (``scipy.fft.next_fast_len``).

    The image is embedded in zeros at that size; wrap-around then reaches at most ``kernel
    half-width`` pixels in from each edge of the image.  The padding of the scene is at least that
    wide (both are ``PSF_RADIUS_IN_FWHM`` FWHM), so the cropped cutout is exactly the linear
    convolution, at about half the cost of zero-padding to twice the size."""

    def __init__(self, shape: tuple[int, int], kernel: np.ndarray, exact_margin: int):
        kh, kw = kernel.shape
        if kh // 2 > exact_margin or kw // 2 > exact_margin:
            raise ValueError(f"PSF kernel half-width {kh // 2} exceeds the padding {exact_margin} (fine pixels)")
        self.shape = shape
        self.fast_shape = tuple(scipy_fft.next_fast_len(n, real=True) for n in shape)
        wrapped = np.zeros(self.fast_shape, np.float32)
        wrapped[:kh, :kw] = kernel
        wrapped = np.roll(wrapped, (-(kh // 2), -(kw // 2)), axis=(0, 1))  # kernel centre at [0, 0]
        self.kernel_ft = scipy_fft.rfft2(wrapped)

    def __call__(self, image: np.ndarray) -> np.ndarray:
        transform = scipy_fft.rfft2(image.astype(np.float32), self.fast_shape)  # zero-filled to the fast size
        convolved = scipy_fft.irfft2(transform * self.kernel_ft, self.fast_shape)
        return convolved[:self.shape[0], :self.shape[1]]  # float32


def unresampled_variance(band: BandConditions, signal: np.ndarray) -> np.ndarray:
    """Expected per-pixel noise variance (ADU^2) of a sky-subtracted image of noiseless ``signal``
    before any resampling: Poisson of sky + signal and read noise, the CCD equation (e.g. Howell
    2006, Handbook of CCD Astronomy)."""
    return ((band.sky_level + np.clip(signal, 0.0, None)) * band.gain + band.read_noise**2) / band.gain**2


def add_noise(signal: np.ndarray, band: BandConditions, noise_seed: int) -> tuple[np.ndarray, float]:
    """``signal`` (ADU, sky-subtracted, float64) plus the band's noise, and the noise's pixel variance
    over :func:`unresampled_variance` (1 for white noise, below 1 for a resampled coadd)."""
    if band.resampling == "none":
        image = galsim.Image(np.array(signal, dtype=np.float64), scale=band.pixel_scale)
        image.addNoise(galsim.CCDNoise(galsim.BaseDeviate(int(noise_seed)), sky_level=band.sky_level,
                                       gain=band.gain, read_noise=band.read_noise))
        return image.array, 1.0
    rng = np.random.default_rng(int(noise_seed))
    kernel = coadd_kernel(band.resampling, band.exposures, rng)
    return signal + coadd_noise(unresampled_variance(band, signal), kernel, rng), kernel.variance_factor


@dataclass(frozen=True)
class ObservedBand:
    """One band of one system after the GalSim stage (all images in ADU, sky-subtracted)."""

    band: BandConditions
    image: np.ndarray  # observed: noiseless scene + noise
    lensed_source: np.ndarray  # noiseless, PSF-convolved lensed source only
    lens_light: np.ndarray  # noiseless, PSF-convolved lens light only
    psf: np.ndarray  # effective PSF (PSF * pixel) at the pixel scale, unit sum
    noise_variance_factor: float = 1.0  # the noise's pixel variance over the unresampled one
    neighbours: np.ndarray | None = None  # noiseless unlensed neighbours (crowded cutouts), or None

    @property
    def signal(self) -> np.ndarray:
        """The noiseless image: lens light, lensed source and any neighbours."""
        signal = self.lensed_source + self.lens_light
        return signal if self.neighbours is None else signal + self.neighbours

    @functools.cached_property
    def variance(self) -> np.ndarray:
        """Expected per-pixel noise variance (ADU^2): Poisson of sky + signal and read noise, times
        the coadd's resampling factor (computed once: the mask, the arc S/N and the files use it)."""
        return unresampled_variance(self.band, self.signal) * self.noise_variance_factor

    @property
    def sky_variance(self) -> float:
        """Expected noise variance (ADU^2) of an empty pixel."""
        return self.band.background_sigma**2 * self.noise_variance_factor

    def source_mask(self, threshold: float) -> np.ndarray:
        """Segmentation label: pixels where the noiseless lensed source exceeds ``threshold`` times the
        pixel's expected noise sigma (``sqrt(variance)``)."""
        return self.lensed_source > threshold * np.sqrt(self.variance)

    @property
    def arc_snr(self) -> float:
        """Matched-filter S/N of the noiseless lensed source: ``sqrt(sum S_i^2 / var_i)`` over the
        cutout's pixels, with ``var_i`` the unresampled variance (the optimal S/N of a known template
        in white Gaussian noise; common practice in lens-finding forecasts).  Resampling a coadd
        lowers each pixel's variance but correlates it, and leaves the S/N of light spread over
        many pixels as it was, so the unresampled variance is the one used."""
        return float(np.sqrt(np.sum(self.lensed_source**2 / self.variance) * self.noise_variance_factor))


def noiseless_pixels(fine: np.ndarray, band: BandConditions, grid, fine_sampling: int,
                     compact: bool = False) -> np.ndarray:
    """The band's pixels (ADU, PSF and pixel response applied, no noise) of ``fine``, counts per
    sample of the padded field at ``fine_sampling`` samples per pixel side: summed to the
    convolution grid, convolved with the band's PSF (a ``compact`` component on the box holding
    its light), summed to pixels and cropped to the cutout."""
    sampling = convolution_sampling(grid.supersampling)
    scale, margin = grid.pixel_scale / sampling, grid.padding * sampling
    first, last = grid.padding * sampling, (grid.padding + grid.size) * sampling
    plane = _block_sum(fine, fine_sampling // sampling)
    box = _light_box(plane, margin) if compact else None
    if box is None:
        convolved = _convolver(band, scale, plane.shape, margin)(plane)
    else:
        part = plane[box]
        convolved = np.zeros(plane.shape, np.float32)
        convolved[box] = _convolver(band, scale, part.shape, margin)(part)
    return _block_sum(convolved[first:last, first:last], sampling).astype(float)


def observe_scene(scene: Scene, band: BandConditions, noise_seed: int,
                  neighbours: np.ndarray | None = None) -> ObservedBand:
    """Apply PSF, pixel response and noise to one band's scene; ``neighbours``, the noiseless
    image (ADU, PSF applied) of unlensed objects around the lens, is added before the noise."""
    grid = scene.grid
    sampling = convolution_sampling(grid.supersampling)
    if scene.sampling % sampling:
        raise ValueError(f"scene sampling {scene.sampling} is not a multiple of the convolution sampling {sampling}")
    lens = noiseless_pixels(scene.lens_light, band, grid, scene.sampling)
    source = noiseless_pixels(scene.lensed_source, band, grid, scene.sampling, compact=True)
    # FFT round-off can leave values of order -1e-7 of the peak; clip before Poisson noise.
    lens = np.clip(lens, 0.0, None)
    source = np.clip(source, 0.0, None)
    signal = lens + source if neighbours is None else lens + source + neighbours
    image, factor = add_noise(signal, band, noise_seed)
    return ObservedBand(band=band, image=image, lensed_source=source, lens_light=lens,
                        psf=effective_psf_image(band), noise_variance_factor=factor, neighbours=neighbours)
