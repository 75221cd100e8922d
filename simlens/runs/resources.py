"""Pre-flight: how much memory one worker and how much disk a run will need, before anything is
written, and a refusal when the machine does not have it.

The memory model counts the largest arrays of one unit of work: the rays of one cutout (or field
stamp) at the convolution sampling out to the PSF's reach, and at full supersampling over as many
pixels as the cutout has (the renderer traces those only where the lensed source has light, in
practice a fraction of the cutout), the shard's image cubes (kept until the shard is written, and copied once
when written), the per-band planes of a system, and for a field run the field planes and the
stamps it keeps.  The bytes per ray and the base of an imported simlens were measured (peak RSS
of ``simlens make`` for cutouts of 64 to 512 pixels and supersampling 4 to 16; ``bench/bench_preflight.py``
prints estimate / measured side by side) and rounded up; the estimate is meant as an upper bound
within a factor of about 1.5 (measured 1.3 to 1.6).
"""

from __future__ import annotations

import math
import os
import shutil
from dataclasses import dataclass
from pathlib import Path

from ..errors import SimlensError
from ..imaging.observe import PSF_IMAGE_SIZE, PSF_RADIUS_IN_FWHM, convolution_sampling
from ..recipe import Recipe
from ..truth.psf import psf_fwhm_range

__all__ = ["ResourceEstimate", "estimate_resources", "available_memory", "free_disk", "check_resources", "size_text"]

BASE_BYTES = 200 * 2**20  # an imported simlens with numpy, astropy, scipy and GalSim (measured ~155 MiB)
BYTES_PER_RAY = 192  # positions, deflections, source-plane samples and refinement (measured ~120-130)
BYTES_PER_SYSTEM_ON_DISK = 8 * 2**10  # truth, image and catalogue rows (FITS + ECSV), measured ~6 KB
FITS_BLOCK = 2880


@dataclass(frozen=True)
class ResourceEstimate:
    """Bytes one worker holds at its peak, bytes the run writes, and what dominates each."""

    memory_per_worker: int
    disk: int
    memory_driver: str  # the largest term, in words
    memory_hint: str  # which recipe keys lower it

    def describe(self) -> str:
        return (f"about {size_text(self.memory_per_worker)} of memory per worker (largest: {self.memory_driver}); "
                f"about {size_text(self.disk)} on disk")


def size_text(n: float) -> str:
    """Bytes in words: ``1.5 GiB``."""
    for unit in ("B", "KiB", "MiB", "GiB", "TiB"):
        if n < 1024 or unit == "TiB":
            return f"{n:.0f} {unit}" if unit == "B" else f"{n:.1f} {unit}"
        n /= 1024
    raise AssertionError  # pragma: no cover


def _major_axis_factor(band) -> float:
    """The largest major-axis FWHM over the round one that the band's PSF ellipticity allows."""
    g = float(band.psf.ellipticity.support[1]) if band.psf.ellipticity is not None else 0.0
    return math.sqrt((1.0 + g) / (1.0 - g))


def _ray_bytes(recipe: Recipe, side: int) -> int:
    """The rays of one stamp of ``side`` pixels (simlens.imaging.render.observation_rays)."""
    survey = recipe.survey
    fwhm_max = max(psf_fwhm_range(recipe, band.name)[1] * _major_axis_factor(band) for band in survey.bands)
    reach = math.ceil(PSF_RADIUS_IN_FWHM * fwhm_max / survey.pixel_scale)
    s = survey.supersampling
    c = convolution_sampling(s)
    rays = ((side + 2 * reach) * c) ** 2
    if c != s:
        rays += (side * s) ** 2
    return rays * BYTES_PER_RAY


def estimate_resources(recipe: Recipe) -> ResourceEstimate:
    """The pre-flight estimate of a recipe (see the module docstring)."""
    survey, output = recipe.survey, recipe.output
    nb = len(survey.bands)
    psf_bytes = nb * PSF_IMAGE_SIZE**2 * 4
    if recipe.field is not None:
        settings = recipe.field
        stamp = settings.lens_stamp_size
        n_fields = -(-recipe.count // settings.lenses)
        lenses = min(settings.lenses, recipe.count)
        terms = {
            f"the rays of one {stamp}x{stamp} lens stamp at supersampling {survey.supersampling}":
                (_ray_bytes(recipe, stamp), "survey.supersampling or field.lens_stamp_size"),
            f"the {lenses} rendered stamps a field keeps":
                (lenses * nb * stamp**2 * 8 * 6, "field.lenses or field.lens_stamp_size"),
            f"the {settings.size}x{settings.size} field planes of {nb} band(s)":
                (settings.size**2 * (40 + 110 * nb), "field.size"),  # measured ~95 B per pixel and band
        }
        disk = n_fields * (nb * (settings.size**2 * 8 + 4 * FITS_BLOCK) + psf_bytes) + recipe.count * BYTES_PER_SYSTEM_ON_DISK
    else:
        n = survey.cutout_size
        shard = min(output.shard_size, recipe.count)
        noiseless_planes = (2 + (recipe.neighbours is not None)) if output.noiseless else 0
        bytes_per_pixel = 4 + 1 + 4 * noiseless_planes + (4 if output.variance else 0)
        terms = {
            f"the rays of one {n}x{n} cutout at supersampling {survey.supersampling}":
                (_ray_bytes(recipe, n), "survey.supersampling or survey.cutout_size"),
            f"the image cubes of a {shard}-system shard":
                (2 * shard * (nb * n**2 * bytes_per_pixel + psf_bytes), "output.shard_size"),
            f"the planes of one {n}x{n} system in {nb} band(s)":
                (nb * n**2 * 8 * 8, "survey.cutout_size"),
        }
        per_system = nb * n**2 * bytes_per_pixel + psf_bytes
        if survey.cadence is not None:  # EPOCH_IMAGES, EPOCH_DIFFERENCE (and EPOCH_POINTS), REFERENCE
            from ..transients.cadence import survey_epochs

            n_epochs = len(survey_epochs(recipe))
            epoch_bytes = (n_epochs * (2 + output.noiseless) + nb) * n**2 * 4
            terms[f"the epoch cubes of a {shard}-system shard ({n_epochs} epochs)"] = (
                2 * shard * epoch_bytes, "output.shard_size, or fewer epochs ([survey.cadence])")
            terms["the epoch images of one system"] = (n_epochs * n**2 * 4 * 3, "fewer epochs ([survey.cadence])")
            per_system += epoch_bytes
            if output.per_system_files:
                per_system += (n_epochs + nb) * (n**2 * 4 + FITS_BLOCK)
        if output.per_system_files:
            planes = 3 + output.variance + (recipe.neighbours is not None)
            per_system += nb * (n**2 * 4 * planes + (planes + 1) * FITS_BLOCK) + psf_bytes
        disk = recipe.count * (per_system + BYTES_PER_SYSTEM_ON_DISK)
    driver = max(terms, key=lambda k: terms[k][0])
    memory = BASE_BYTES + sum(b for b, _ in terms.values())
    return ResourceEstimate(memory_per_worker=int(memory), disk=int(disk), memory_driver=driver,
                            memory_hint=terms[driver][1])


def available_memory() -> int | None:
    """Memory this machine can give without swapping (Linux ``MemAvailable``), or None if unknown."""
    try:
        with open("/proc/meminfo", encoding="ascii") as f:
            for line in f:
                if line.startswith("MemAvailable:"):
                    return int(line.split()[1]) * 1024
    except (OSError, ValueError, IndexError):
        pass
    try:
        return os.sysconf("SC_AVPHYS_PAGES") * os.sysconf("SC_PAGE_SIZE")
    except (AttributeError, ValueError, OSError):
        return None


def free_disk(path: Path) -> int | None:
    """Free bytes on the file system that ``path`` (or its nearest existing parent) is on."""
    path = Path(path).absolute()
    for candidate in (path, *path.parents):
        if candidate.exists():
            try:
                return shutil.disk_usage(candidate).free
            except OSError:
                return None
    return None


def check_resources(recipe: Recipe, out: Path, local_workers: int | None) -> ResourceEstimate:
    """Refuse a run this machine cannot hold: the memory of ``local_workers`` workers on this
    machine (None: they run elsewhere, on a Dask cluster), and the disk at ``out``."""
    estimate = estimate_resources(recipe)
    memory = available_memory()
    if local_workers is not None and memory is not None and estimate.memory_per_worker * local_workers > memory:
        per = f" x {local_workers} workers" if local_workers > 1 else ""
        raise SimlensError(
            f"this run needs about {size_text(estimate.memory_per_worker)} of memory per worker{per} "
            f"(largest: {estimate.memory_driver}) and this machine has {size_text(memory)} free; lower "
            f"{estimate.memory_hint}" + (" or --workers" if local_workers > 1 else "")
            + " (or pass --no-resource-check to try anyway)")
    disk = free_disk(out)
    if disk is not None and estimate.disk > disk:
        raise SimlensError(
            f"{out}: this run writes about {size_text(estimate.disk)} and the disk there has {size_text(disk)} free; "
            f"lower count, survey.cutout_size or the planes written (output.noiseless, output.per_system_files), "
            f"or choose another --out (or pass --no-resource-check to try anyway)")
    return estimate
