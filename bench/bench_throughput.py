"""Cutout throughput of simlens against plain GalSim, and deflection cost per ray.

1. Throughput.  The demo survey (three bands, 64x64 pixels of 0.2", Moffat PSFs, CCD noise), lens light
   plus a Sersic source without clumps, default 4x supersampling, written to a shard file:
     simlens  `render_shard`: sampling, ray tracing once per system, scenes, GalSim stage, image
              finding, shard writing
     galsim   the same systems drawn with GalSim directly *without lensing*: per band
              Convolve(Sersic_lens + Sersic_source, Moffat).drawImage + CCDNoise, the images
              stacked into a cube and written with the truth rows to one FITS file
   The ratio simlens / galsim is measured side by side in this run (goal <= 1.0).
2. Deflection per ray: simlens.lensing.mass.SIE.deflection against the bare closed-form numpy expression
   on 65,536 rays (goal <= 1.2x).

Run: python bench/bench_throughput.py [--n 100] [--rounds 3]
"""

from __future__ import annotations

import argparse
import dataclasses
import tempfile
import time
from pathlib import Path

import galsim
import numpy as np
from astropy.io import fits
from astropy.table import Table

import simlens
from simlens.imaging.scene import build_scene
from simlens.lensing.mass import SIE
from simlens.imaging.observe import psf_profile
from simlens.recipe.distributions import Fixed
from simlens.runs.shards import ShardSpec, render_shard


def demo_without_clumps(n: int, adaptive: bool = True):
    recipe = simlens.load_recipe(Path(__file__).parents[1] / "recipes" / "demo.toml").with_overrides(count=n)
    source = dataclasses.replace(recipe.source, clumps=dataclasses.replace(recipe.source.clumps, count=Fixed(0)))
    output = dataclasses.replace(recipe.output, shard_size=n, per_system_files=False)
    survey = dataclasses.replace(recipe.survey, adaptive_supersampling=adaptive)
    return dataclasses.replace(recipe, source=source, output=output, survey=survey)


def galsim_route(systems, size: int, path: Path) -> None:
    nb = len(systems[0].bands)
    cube = np.zeros((len(systems), nb, size, size), np.float32)
    rows = []
    for k, s in enumerate(systems):
        scene = build_scene(s)
        for b, band in enumerate(s.bands):
            lens = scene.lens_light[band.name]
            src = scene.source_light[band.name]
            profile = galsim.Sersic(n=lens.sersic_index, half_light_radius=lens.half_light_radius, flux=lens.flux)
            profile = profile.shear(q=lens.q, beta=lens.angle * galsim.degrees)
            source = galsim.Sersic(n=src.sersic_index, half_light_radius=src.half_light_radius, flux=src.flux)
            source = source.shear(q=src.q, beta=src.angle * galsim.degrees).shift(*src.center)
            image = galsim.Convolve(profile + source, psf_profile(band)).drawImage(nx=size, ny=size, scale=band.pixel_scale)
            image.addNoise(galsim.CCDNoise(galsim.BaseDeviate(s.noise_seeds[b]), sky_level=band.sky_level,
                                           gain=band.gain, read_noise=band.read_noise))
            cube[k, b] = image.array
        rows.append({"system_id": s.system_id, "ra": s.ra, "dec": s.dec, "z_lens": s.z_lens})
    fits.HDUList([fits.PrimaryHDU(), fits.ImageHDU(cube, name="IMAGES"),
                  fits.BinTableHDU(Table(rows=rows), name="TRUTH")]).writeto(path, overwrite=True)


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
    best = {}
    for name, f in (("bare", bare), ("simlens", lambda: lens.deflection(x, y))):
        times = []
        for _ in range(repeats):
            t0 = time.perf_counter()
            f()
            times.append(time.perf_counter() - t0)
        best[name] = float(np.median(times))
    return best["simlens"] / best["bare"], best["simlens"], best["bare"]


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--n", type=int, default=100)
    parser.add_argument("--rounds", type=int, default=3)
    args = parser.parse_args()
    recipe = demo_without_clumps(args.n)
    sampler = simlens.PopulationSampler(recipe)
    systems = [sampler.draw(i) for i in range(args.n)]
    rounds = {"simlens": [], "fixed": [], "galsim": []}
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        (tmp / "shards").mkdir()
        render_shard(recipe, tmp, ShardSpec(0, 0, min(5, args.n)))  # warm up imports and caches
        galsim_route(systems[:5], recipe.survey.cutout_size, tmp / "warm.fits")
        fixed_recipe = demo_without_clumps(args.n, adaptive=False)
        for _ in range(args.rounds):  # interleaved, so that machine noise hits every route alike
            t0 = time.perf_counter()
            result = render_shard(recipe, tmp, ShardSpec(0, 0, args.n))
            t1 = time.perf_counter()
            galsim_route(systems, recipe.survey.cutout_size, tmp / "galsim.fits")
            t2 = time.perf_counter()
            render_shard(fixed_recipe, tmp, ShardSpec(0, 0, args.n))
            t3 = time.perf_counter()
            rounds["simlens"].append(t1 - t0)
            rounds["galsim"].append(t2 - t1)
            rounds["fixed"].append(t3 - t2)
    ratio = float(np.median(np.array(rounds["simlens"]) / np.array(rounds["galsim"])))
    ratio_fixed = float(np.median(np.array(rounds["fixed"]) / np.array(rounds["galsim"])))
    per = {k: float(np.median(v)) / args.n * 1e3 for k, v in rounds.items()}
    print(f"{args.n} systems x 3 bands, 64x64, lens light + lensed Sersic source, Moffat, CCD noise, one shard file;"
          f" medians of {args.rounds} interleaved rounds")
    print(f"  simlens  {per['simlens']:7.2f} ms per system (defaults: 4x4 rays, adaptive 16x16 where needed)")
    print(f"  simlens  {per['fixed']:7.2f} ms per system (adaptive_supersampling = false)")
    print(f"  galsim   {per['galsim']:7.2f} ms per system (same scenes unlensed, drawn directly)")
    print(f"  ratio simlens / galsim: {ratio:.2f} with defaults, {ratio_fixed:.2f} without adaptive refinement "
          f"(goal <= 1.0)")
    total = sum(result.timings.values())
    print("  where simlens's time goes: " + ", ".join(
        f"{k} {v / total:.0%}" for k, v in sorted(result.timings.items(), key=lambda kv: -kv[1])))
    ratio, t_ours, t_bare = deflection_ratio()
    print(f"deflection of 65,536 rays: simlens SIE {t_ours * 1e3:.2f} ms, bare numpy {t_bare * 1e3:.2f} ms, "
          f"ratio {ratio:.2f} (goal <= 1.2)")


if __name__ == "__main__":
    main()
