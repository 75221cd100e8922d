"""Speed and accuracy of simlens's rendering against GalSim drawing the same scenes itself.

Unlensed scenes (a negligible deflector), three bands per system (Moffat PSFs of 0.9, 0.8, 0.75
arcsec), lens light (Sersic n = 4) plus a source (Sersic n = 1), 64x64 pixels of 0.2 arcsec.  Three
routes, noise excluded from all:

  galsim-direct   per band, galsim.Convolve(Sersic + Sersic, PSF).drawImage(...): the accuracy
                  reference (GalSim integrates the pixel and convolves in Fourier space)
  simlens         what `simlens make` does: one ray map and one evaluation of each shape per system,
                  then per band simlens.imaging.observe.observe_scene (PSF kernel drawn by GalSim, FFT
                  convolution, block sums, and CCD noise, whose cost is included; the noiseless
                  planes are compared)
  interpolated    the same supersampled scene wrapped in galsim.InterpolatedImage, convolved with each
                  band's PSF and drawn by GalSim (the alternative route)

Prints ms per system, the ratio to galsim-direct (measured side by side in this run), the worst
flux error and the worst pixel residual relative to the peak.
Run: python bench/bench_psf_stage.py [--n 20]
"""

from __future__ import annotations

import argparse
import time

import galsim
import numpy as np

from simlens.imaging.light import Sersic
from simlens.lensing.mass import SIS
from simlens.imaging.observe import observe_scene, padding_for, psf_profile
from simlens.imaging.rays import ComponentImages, PixelGrid, Scene, trace_rays
from simlens.imaging.render import observation_rays
from simlens.truth.conditions import BandConditions

FWHMS = (0.9, 0.8, 0.75)


def bands():
    return [BandConditions(name=f"b{i}", pixel_scale=0.2, zero_point=26.8, sky_brightness=21.2, exposure_time=900,
                           gain=4, read_noise=7, psf_profile="moffat", psf_fwhm=f, psf_beta=3.0)
            for i, f in enumerate(FWHMS)]


def scenes(n, rng):
    for _ in range(n):
        lens = Sersic(flux=2e5, half_light_radius=rng.uniform(0.5, 1.5), sersic_index=4.0,
                      q=rng.uniform(0.5, 1), angle=rng.uniform(0, 180))
        src = Sersic(flux=2e4, half_light_radius=rng.uniform(0.15, 0.5), sersic_index=1.0,
                     q=rng.uniform(0.4, 1), angle=rng.uniform(0, 180), center=tuple(rng.uniform(-1.5, 1.5, 2)))
        yield lens, src


def galsim_profile(p: Sersic):
    g = galsim.Sersic(n=p.sersic_index, half_light_radius=p.half_light_radius, flux=p.flux)
    return g.shear(q=p.q, beta=p.angle * galsim.degrees).shift(*p.center)


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--n", type=int, default=20)
    args = parser.parse_args()
    size = 64
    rng = np.random.default_rng(1)
    grid = PixelGrid(size=size, pixel_scale=0.2, supersampling=4, padding=padding_for(max(FWHMS), 0.2))
    params = galsim.GSParams(maximum_fft_size=16384)
    times = {"galsim-direct": 0.0, "simlens": 0.0, "interpolated": 0.0}
    flux_err = {"simlens": [], "interpolated": []}
    worst = {"simlens": [], "interpolated": []}
    for lens, src in scenes(args.n, rng):
        t0 = time.perf_counter()
        references = [galsim.Convolve(galsim_profile(lens) + galsim_profile(src), psf_profile(b), gsparams=params)
                      .drawImage(nx=size, ny=size, scale=0.2).array for b in bands()]
        t1 = time.perf_counter()
        rays, sampling = observation_rays(SIS(einstein_radius=1e-8), grid)
        cache = ComponentImages(rays, sampling)
        lens_image, source_image = cache.render(lens, lensed=False), cache.render(src, lensed=True)
        scene = Scene("b", grid, lens_image, source_image, src.flux, sampling=sampling)
        ours = []
        for b in bands():
            observed = observe_scene(scene, b, noise_seed=1)  # noise excluded below: noiseless planes
            ours.append(observed.lens_light + observed.lensed_source)
        t2 = time.perf_counter()
        full = ComponentImages(trace_rays(SIS(einstein_radius=1e-8), grid))  # full ray grid everywhere
        fine = full.render(lens, lensed=False) + full.render(src, lensed=True)
        interp = galsim.InterpolatedImage(galsim.Image(fine / grid.fine_pixel_area, scale=grid.fine_scale),
                                          normalization="sb", gsparams=params)
        alternative = [galsim.Convolve(interp, psf_profile(b), gsparams=params).drawImage(
            nx=size, ny=size, scale=0.2).array for b in bands()]
        t3 = time.perf_counter()
        times["galsim-direct"] += t1 - t0
        times["simlens"] += t2 - t1
        times["interpolated"] += t3 - t2
        for name, images in (("simlens", ours), ("interpolated", alternative)):
            for image, reference in zip(images, references):
                flux_err[name].append(abs(image.sum() / reference.sum() - 1))
                worst[name].append(np.abs(image - reference).max() / reference.max())
    base = times["galsim-direct"]
    print(f"{args.n} unlensed systems x 3 bands (n=4 lens + n=1 source), {size}x{size} px of 0.2\", "
          f"Moffat {'/'.join(map(str, FWHMS))}\", 4x supersampling")
    print(f"{'route':<15}{'ms/system':>10}{'ratio':>8}{'max |flux err|':>16}{'max |resid|/peak':>18}")
    for name, t in times.items():
        fe = max(flux_err[name]) if name in flux_err else 0.0
        wr = max(worst[name]) if name in worst else 0.0
        print(f"{name:<15}{t / args.n * 1e3:>10.2f}{t / base:>8.2f}{fe:>16.2e}{wr:>18.2e}")


if __name__ == "__main__":
    main()
