"""A system at every epoch of the survey: the static scene traced once, the point sources per epoch.

The lens light, the lensed host and any second source do not change from visit to visit: their
scene is traced and refined once (:class:`~simlens.imaging.render.SystemRendering`), summed to the
PSF stage's grid and Fourier transformed once per band.  Each epoch then multiplies that transform
by the transform of its own PSF (kept for all systems of a shard: the epochs are the run's), adds
the point sources (a supernova's or a quasar's images) at their fluxes at that epoch, and draws
that visit's noise.  Image ``k`` of the source, with signed magnification ``mu_k`` and delay
``dt_k`` after the first image, shows at time ``t`` the source's light at ``t - dt_k`` times
``|mu_k|`` (microlensing by the lens's stars is not modelled).

The static reference of each band (for difference imaging) is the same static scene seen with the
band's own conditions (the system's ``bands``): noiseless, without the point sources.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import fft as scipy_fft

from ..transients.cadence import Epochs
from .light import PointSource
from .observe import _block_sum, _FFTConvolver, add_noise, convolution_sampling, psf_kernel
from .rays import deposit_points

__all__ = ["EpochImages", "EpochRenderer"]


@dataclass(frozen=True, eq=False)
class EpochImages:
    """One system's epochs ``(epochs, ny, nx)``, ADU, sky-subtracted: observed images, their ideal
    difference images (less the static scene seen with each epoch's PSF: the point sources and the
    noise, as a perfectly PSF-matched subtraction leaves them) and the noiseless point-source light;
    the noiseless static reference per band, and the light-curve truth (one row per image and epoch)."""

    images: np.ndarray
    difference: np.ndarray  # images minus the static scene seen at each epoch's own PSF
    points: np.ndarray
    reference: dict  # band -> (ny, nx)
    light_curve_rows: list


def epoch_noise_seed(system, epoch: int) -> int:
    """The noise seed of one epoch of a system, from its band noise seeds and the epoch's index."""
    state = np.random.SeedSequence([int(s) for s in system.noise_seeds] + [0x65706F6368, int(epoch)]).generate_state(1)
    return int(state[0] % (2**31 - 2)) + 1


class EpochRenderer:
    """Renders systems at a run's epochs, keeping each epoch's PSF transform for the systems after."""

    def __init__(self, epochs: Epochs):
        self.epochs = epochs
        self._convolvers: dict = {}

    def _convolver(self, conditions, scale: float, shape: tuple, margin: int) -> _FFTConvolver:
        key = (conditions.psf_profile, conditions.psf_fwhm, conditions.psf_beta, conditions.psf_g1,
               conditions.psf_g2, conditions.psf_optics, scale, shape, margin)
        convolver = self._convolvers.get(key)
        if convolver is None:
            convolver = self._convolvers[key] = _FFTConvolver(shape, psf_kernel(conditions, scale), exact_margin=margin)
        return convolver

    def render(self, rendering) -> EpochImages:
        """``rendering``: the system's :class:`~simlens.imaging.render.SystemRendering`, its grid
        padded for the widest PSF of the epochs."""
        system, grid, epochs = rendering.system, rendering.grid, self.epochs
        sampling = convolution_sampling(grid.supersampling)
        scale, margin = grid.pixel_scale / sampling, grid.padding * sampling
        first, last = grid.padding * sampling, (grid.padding + grid.size) * sampling

        def pixels(convolved: np.ndarray) -> np.ndarray:
            return np.clip(_block_sum(convolved[first:last, first:last], sampling).astype(float), 0.0, None)

        static, reference, shape = {}, {}, None
        for conditions in system.bands:
            scene = rendering.band_scene(conditions.name, points=False)
            plane = _block_sum(scene.lens_light + scene.lensed_source, scene.sampling // sampling).astype(np.float32)
            shape = plane.shape
            own = self._convolver(conditions, scale, shape, margin)
            static[conditions.name] = scipy_fft.rfft2(plane, own.fast_shape)
            reference[conditions.name] = pixels(scipy_fft.irfft2(static[conditions.name] * own.kernel_ft, own.fast_shape))

        found = rendering.images
        delays = rendering.delays if rendering.delays is not None else np.zeros(len(found))
        delays = np.where(np.isfinite(delays), delays, 0.0)
        n_images = len(found)
        source_times = epochs.time[:, None] - delays[None, :]  # (epochs, images)
        magnitudes = _source_magnitudes(system, source_times)
        n = grid.size
        images = np.zeros((len(epochs), n, n), np.float32)
        difference = np.zeros((len(epochs), n, n), np.float32)
        points = np.zeros((len(epochs), n, n), np.float32)
        rows = []
        for e, (band, conditions) in enumerate(zip(epochs.band, epochs.conditions)):
            convolver = self._convolver(conditions, scale, shape, margin)
            transform = static[band]
            point_pixels = None
            if magnitudes is not None and n_images:
                unlensed = magnitudes[band][e]
                flux = np.array([conditions.counts_from_magnitude(m) for m in unlensed]) * np.abs(found.magnification)
                deposits = np.zeros(shape, np.float32)
                deposit_points(deposits, grid, tuple(PointSource(flux=float(f), center=(float(x), float(y)))
                                                     for f, x, y in zip(flux, found.x, found.y) if f > 0), sampling)
                point_ft = scipy_fft.rfft2(deposits, convolver.fast_shape)
                point_pixels = pixels(scipy_fft.irfft2(point_ft * convolver.kernel_ft, convolver.fast_shape))
                for k in range(n_images):
                    mu = float(found.magnification[k])
                    rows.append(dict(system_id=system.system_id, image=k, epoch=e, mjd=float(epochs.time[e]), band=band,
                                     source_time=float(source_times[e, k]), magnification=mu,
                                     unlensed_magnitude=float(unlensed[k]), flux=float(flux[k]),
                                     magnitude=float(unlensed[k]) - 2.5 * math.log10(abs(mu)) if flux[k] > 0 else math.inf))
            static_pixels = pixels(scipy_fft.irfft2(transform * convolver.kernel_ft, convolver.fast_shape))
            signal = static_pixels
            if point_pixels is not None:
                signal = signal + point_pixels
                points[e] = point_pixels
            images[e] = add_noise(signal, conditions, epoch_noise_seed(system, e))[0]
            difference[e] = images[e] - static_pixels
        return EpochImages(images=images, difference=difference, points=points, reference=reference,
                           light_curve_rows=rows)


def _source_magnitudes(system, times: np.ndarray) -> dict | None:
    """``band -> unlensed AB magnitudes`` of the system's point source at ``times`` (any shape), or
    None without one; a quasar without variability keeps its mean magnitudes."""
    if system.light_curve is not None:
        flat = system.light_curve.magnitudes_at(times.ravel())
        return {band: values.reshape(times.shape) for band, values in flat.items()}
    if system.quasar_magnitudes is not None:
        return {band: np.full(times.shape, float(m)) for band, m in system.quasar_magnitudes.items()}
    return None
