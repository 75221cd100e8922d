"""Cutout throughput of simlens against plain GalSim at several cutout sizes and band counts, the
bare-kernel floor, and the deflection cost per ray.

1. Throughput.  The demo survey (pixels of 0.2", Moffat PSFs, CCD noise), lens light plus a Sersic
   source without clumps, default 4x supersampling, one shard file, for cutouts of 32 to 256 pixels
   in 3 bands and of 64 pixels in 1 and 6 bands:
     simlens  `render_shard`: ray tracing once per system, scenes, GalSim stage, image finding,
              shard writing (IMAGES, MASK, SOURCE, LENS, VARIANCE, PSF and the truth tables)
     galsim   the same systems drawn with GalSim directly *without lensing*, like for like: per
              band the lens and the source each Convolve(Sersic, Moffat).drawImage (the two
              noiseless planes), their sum with CCDNoise, the variance, the mask and the
              pixel-integrated PSF, the six cubes and the truth rows written to one FITS file
   The ratio simlens / galsim is measured side by side in this run, the two routes interleaved
   (goal <= 1.0).
2. The floor at 64 pixels, 3 bands: the bare numpy kernels the renderer runs (SIE + shear
   deflection per ray, Sersic per sample), timed here and multiplied by the rays and samples the
   renderer used on these systems, plus the FFTs at the sizes it used and GalSim's CCD noise
   (goal: simlens within 2x of it).
3. Deflection per ray: simlens.lensing.mass.SIE.deflection against the bare closed-form numpy
   expression on 65,536 rays (goal <= 1.2x).

Run: python bench/bench_throughput.py [--n 60] [--rounds 3] [--configs 32x3,64x3,...]
"""

from __future__ import annotations

import argparse
import math
import re
import tempfile
import time
from pathlib import Path

import galsim
import numpy as np
from astropy.io import fits
from astropy.table import Table
from scipy import fft as scipy_fft

import simlens
from simlens.imaging.observe import psf_profile
from simlens.imaging.render import SystemRendering
from simlens.imaging.scene import build_scene
from simlens.lensing.mass import SIE
from simlens.runs.shards import ShardSpec, render_shard

DEMO = Path(__file__).parents[1] / "recipes" / "demo.toml"
CONFIGS = ((32, 3), (64, 3), (128, 3), (256, 3), (64, 1), (64, 6))
# Three more bands for the 6-band case, copies of the i band with colours of their own (illustrative).
EXTRA_BANDS = {"z": (-0.9, -0.2, 0.1), "y": (-1.1, -0.3, 0.1), "u": (2.6, 0.5, -0.3)}  # lens, source, clumps


def demo_recipe(n: int, size: int = 64, bands: int = 3, adaptive: bool = True, folder: Path | None = None):
    """The demo recipe without clumps, one shard of ``n`` systems, ``size`` pixels, 1, 3 or 6 bands."""
    text = DEMO.read_text()
    text = re.sub(r"cutout_size = \d+", f"cutout_size = {size}", text)
    text = re.sub(r"count = \{ choice = \[0, 1, 2, 3, 4\] \}", "count = 0", text)
    text = re.sub(r"shard_size = \d+", f"shard_size = {n}", text)
    text = text.replace("per_system_files = true", "per_system_files = false")
    text = text.replace("supersampling = 4 ", f"supersampling = 4\nadaptive_supersampling = {str(adaptive).lower()} ")
    if bands == 1:
        text = re.sub(r"\[survey\.bands\.[gi]\]\n(.+\n)+?psf = .+\n", "", text)
        text = re.sub(r"colors = \{[^}]*\}", "colors = {}", text)
    elif bands == 6:
        block = re.search(r"\[survey\.bands\.i\]\n(.+\n)+?psf = .+\n", text).group(0)
        for band, (lens, source, clumps) in EXTRA_BANDS.items():
            text = text.replace(block, block + "\n" + block.replace("bands.i]", f"bands.{band}]"), 1)
            colours = iter(re.findall(r"colors = \{[^}]*\}", text))
            for value in (lens, source, clumps):
                old = next(colours)
                text = text.replace(old, old[:-1].rstrip() + f", {band} = {value} }}", 1)
    elif bands != 3:
        raise ValueError("bands: 1, 3 or 6")
    folder = folder or Path(tempfile.mkdtemp())
    path = folder / f"bench_{size}_{bands}_{int(adaptive)}.toml"
    path.write_text(text)
    return simlens.load_recipe(path).with_overrides(count=n)


def galsim_route(systems, size: int, path: Path) -> None:
    nb = len(systems[0].bands)
    cubes = {name: np.zeros((len(systems), nb, size, size), np.float32) for name in ("IMAGES", "SOURCE", "LENS", "VARIANCE")}
    cubes["MASK"] = np.zeros((len(systems), nb, size, size), np.uint8)
    cubes["PSF"] = np.zeros((len(systems), nb, 25, 25), np.float32)
    rows = []
    for k, s in enumerate(systems):
        scene = build_scene(s)
        for b, band in enumerate(s.bands):
            lens = scene.lens_light[band.name]
            src = scene.source_light[band.name]
            psf = psf_profile(band)
            profile = galsim.Sersic(n=lens.sersic_index, half_light_radius=lens.half_light_radius, flux=lens.flux)
            profile = profile.shear(q=lens.q, beta=lens.angle * galsim.degrees)
            source = galsim.Sersic(n=src.sersic_index, half_light_radius=src.half_light_radius, flux=src.flux)
            source = source.shear(q=src.q, beta=src.angle * galsim.degrees).shift(*src.center)
            lens_plane = galsim.Convolve(profile, psf).drawImage(nx=size, ny=size, scale=band.pixel_scale).array
            source_plane = galsim.Convolve(source, psf).drawImage(nx=size, ny=size, scale=band.pixel_scale).array
            image = galsim.Image(lens_plane + source_plane, scale=band.pixel_scale, dtype=np.float64)
            image.addNoise(galsim.CCDNoise(galsim.BaseDeviate(s.noise_seeds[b]), sky_level=band.sky_level,
                                           gain=band.gain, read_noise=band.read_noise))
            signal = np.clip(lens_plane + source_plane, 0, None)
            variance = ((band.sky_level + signal) * band.gain + band.read_noise**2) / band.gain**2
            cubes["VARIANCE"][k, b] = variance
            cubes["IMAGES"][k, b] = image.array
            cubes["SOURCE"][k, b] = source_plane
            cubes["LENS"][k, b] = lens_plane
            cubes["MASK"][k, b] = source_plane > np.sqrt(variance)
            cubes["PSF"][k, b] = psf.drawImage(nx=25, ny=25, scale=band.pixel_scale).array
        rows.append({"system_id": s.system_id, "ra": s.ra, "dec": s.dec, "z_lens": s.z_lens})
    hdus = [fits.PrimaryHDU()] + [fits.ImageHDU(cube, name=name) for name, cube in cubes.items()]
    fits.HDUList(hdus + [fits.BinTableHDU(Table(rows=rows), name="TRUTH")]).writeto(path, overwrite=True)


def best_time(f, repeats: int = 20) -> float:
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        f()
        times.append(time.perf_counter() - t0)
    return float(np.median(times))


def bare_sie_shear(x, y, b=1.2, q=0.7, angle=30.0, gamma=0.05, gamma_angle=10.0):
    c, s = math.cos(math.radians(angle)), math.sin(math.radians(angle))
    xp, yp = c * x + s * y, -s * x + c * y
    e = math.sqrt(1 - q * q)
    w = np.sqrt(q * q * xp * xp + yp * yp)
    ax, ay = b * math.sqrt(q) / e * np.arctan(e * xp / w), b * math.sqrt(q) / e * np.arctanh(e * yp / w)
    g1, g2 = gamma * math.cos(2 * math.radians(gamma_angle)), gamma * math.sin(2 * math.radians(gamma_angle))
    return x - (c * ax - s * ay) - (g1 * x + g2 * y), y - (s * ax + c * ay) - (g2 * x - g1 * y)


def bare_sersic(x, y, n=1.0, r_e=0.3, q=0.7, angle=20.0, i_e=1.0, b=1.678):
    c, s = math.cos(math.radians(angle)), math.sin(math.radians(angle))
    xp, yp = c * x + s * y, c * y - s * x
    return i_e * np.exp(-b * (((q * xp * xp + yp * yp / q) / r_e**2) ** (0.5 / n) - 1.0))


def floor_per_system(recipe, systems) -> tuple[float, dict]:
    """The bare-kernel floor of rendering ``systems`` (ms per system) and its parts."""
    rng = np.random.default_rng(1)
    x, y = rng.uniform(-3, 3, (2, 65536))
    per_ray = best_time(lambda: bare_sie_shear(x, y)) / x.size
    per_sample = best_time(lambda: bare_sersic(x, y)) / x.size
    survey = recipe.survey
    rays = samples = fft = noise = 0.0
    for system in systems:
        rendering = SystemRendering(system, survey, recipe.reference_band)
        rendering.render()
        components, grid = rendering.components, rendering.grid
        ss, s = grid.supersampling, components.sampling
        traced = rendering.rays.x.size + components.detailed_pixels * ss * ss
        traced += components.refined_pixels * (4 * ss) ** 2  # refined once for the one lensed component
        rays += traced * per_ray
        # the source on every traced ray, the lens light once on the padded grid at the PSF stage's sampling
        samples += (traced + (grid.padded_size * s) ** 2) * per_sample
        m = scipy_fft.next_fast_len(grid.padded_size * s, real=True)
        image = rng.random((m, m)).astype(np.float32)
        kernel = scipy_fft.rfft2(image)
        fft += len(system.bands) * best_time(lambda: scipy_fft.rfft2(image), 3)  # each band's kernel
        fft += 2 * len(system.bands) * best_time(lambda: scipy_fft.irfft2(scipy_fft.rfft2(image) * kernel, (m, m)), 3)
        band = system.bands[0]
        noise_image = galsim.Image(np.full((grid.size, grid.size), 10.0), dtype=np.float64)
        ccd = galsim.CCDNoise(galsim.BaseDeviate(1), sky_level=band.sky_level, gain=band.gain, read_noise=band.read_noise)
        noise += len(system.bands) * best_time(lambda: noise_image.addNoise(ccd), 3)
    n = len(systems)
    parts = {"rays": rays / n * 1e3, "Sersic samples": samples / n * 1e3, "FFTs": fft / n * 1e3, "noise": noise / n * 1e3}
    return sum(parts.values()), parts


def deflection_ratio(repeats: int = 50) -> tuple[float, float, float]:
    rng = np.random.default_rng(0)
    x, y = rng.uniform(-3, 3, (2, 256, 256))
    lens = SIE(einstein_radius=1.2, q=0.7, angle=30.0)

    def bare():
        c, s = np.cos(np.radians(30.0)), np.sin(np.radians(30.0))
        xp, yp = c * x + s * y, -s * x + c * y
        q, b = 0.7, 1.2
        e = np.sqrt(1 - q * q)
        w = np.sqrt(q * q * xp * xp + yp * yp)
        ax, ay = b * np.sqrt(q) / e * np.arctan(e * xp / w), b * np.sqrt(q) / e * np.arctanh(e * yp / w)
        return c * ax - s * ay, s * ax + c * ay

    np.testing.assert_allclose(np.array(bare()), np.array(lens.deflection(x, y)), rtol=1e-12, atol=1e-14)
    t_bare, t_ours = best_time(bare, repeats), best_time(lambda: lens.deflection(x, y), repeats)
    return t_ours / t_bare, t_ours, t_bare


def throughput(size: int, bands: int, n: int, rounds: int, folder: Path):
    recipe = demo_recipe(n, size, bands, folder=folder)
    sampler = simlens.PopulationSampler(recipe)
    systems = sampler.draw_many(range(n))
    (folder / "shards").mkdir(exist_ok=True)
    render_shard(recipe.with_overrides(count=min(5, n)), folder, ShardSpec(0, 0, min(5, n)))  # warm up
    galsim_route(systems[:5], size, folder / "warm.fits")
    ours, theirs = [], []
    for _ in range(rounds):  # interleaved, so that machine noise hits both routes alike
        t0 = time.perf_counter()
        result = render_shard(recipe, folder, ShardSpec(0, 0, n))
        t1 = time.perf_counter()
        galsim_route(systems, size, folder / "galsim.fits")
        t2 = time.perf_counter()
        ours.append(t1 - t0)
        theirs.append(t2 - t1)
    ratio = float(np.median(np.array(ours) / np.array(theirs)))
    return recipe, systems, float(np.median(ours)) / n * 1e3, float(np.median(theirs)) / n * 1e3, ratio, result.timings


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--n", type=int, default=60)
    parser.add_argument("--rounds", type=int, default=3)
    parser.add_argument("--configs", default=",".join(f"{s}x{b}" for s, b in CONFIGS),
                        help="cutout sizes x band counts, e.g. 64x3,128x3")
    args = parser.parse_args()
    configs = [tuple(int(v) for v in c.split("x")) for c in args.configs.split(",")]
    galsim.set_omp_threads(1)
    print(f"{args.n} systems per case, lens light + lensed Sersic source, Moffat, CCD noise, one shard file; "
          f"medians of {args.rounds} interleaved rounds; 4x4 rays, adaptive refinement on")
    print(f"{'cutout':>7} {'bands':>5} {'simlens ms':>11} {'galsim ms':>10} {'ratio':>6}  where simlens's time goes")
    floor_case = None
    with tempfile.TemporaryDirectory() as tmp:
        for size, bands in configs:
            folder = Path(tmp) / f"{size}_{bands}"
            folder.mkdir()
            recipe, systems, ours, theirs, ratio, timings = throughput(size, bands, args.n, args.rounds, folder)
            total = sum(timings.values())
            split = ", ".join(f"{k} {v / total:.0%}" for k, v in sorted(timings.items(), key=lambda kv: -kv[1])[:4])
            print(f"{size:>7} {bands:>5} {ours:>11.1f} {theirs:>10.1f} {ratio:>6.2f}  {split}", flush=True)
            if (size, bands) == (64, 3):
                floor_case = (recipe, systems, ours)
    if floor_case is not None:
        recipe, systems, ours = floor_case
        floor, parts = floor_per_system(recipe, systems[:20])
        print(f"floor at 64 px, 3 bands: {floor:.1f} ms per system (" +
              ", ".join(f"{k} {v:.1f}" for k, v in parts.items()) +
              f"); simlens {ours:.1f} ms: {ours / floor:.2f}x the floor (goal <= 2)")
    ratio, t_ours, t_bare = deflection_ratio()
    print(f"deflection of 65,536 rays: simlens SIE {t_ours * 1e3:.2f} ms, bare numpy {t_bare * 1e3:.2f} ms, "
          f"ratio {ratio:.2f} (goal <= 1.2)")


if __name__ == "__main__":
    main()
