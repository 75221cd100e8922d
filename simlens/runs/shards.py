"""One shard: a block of consecutive systems rendered and written as one unit of work.

The shard layout depends only on the recipe (``output.shard_size``), never on how many workers run
it, and each system's randomness on ``(seed, system_id)`` alone; so the files of a run are the same,
byte for byte, whatever engine or number of workers produced them.  :func:`render_shard` is what a
worker process (local or Dask) runs: it writes the shard's file(s) and returns their checksums.
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field
from pathlib import Path

import galsim
import numpy as np

from ..errors import reported_as
from ..output.checksums import sha256_of
from ..output.cutout_fits import write_cutout
from ..output.shard_fits import write_shard
from ..output.truth import (NEIGHBOUR_COLUMNS, epoch_table, image_rows, image_table, light_curve_table,
                           line_of_sight_rows, line_of_sight_table, neighbour_rows, objects_table, subhalo_rows,
                           subhalo_table, truth_row, truth_table)
from ..truth.sampler import PopulationSampler
from ..recipe import Recipe
from ..truth.selection import merge_attrition
from .rendering import STAGES, rendered_systems

__all__ = ["ShardSpec", "ShardResult", "shard_plan", "part_size", "render_shard", "shard_path", "cutout_path"]


@dataclass(frozen=True)
class ShardSpec:
    index: int
    first_system: int
    n_systems: int


@dataclass(frozen=True)
class ShardResult:
    spec: ShardSpec
    files: dict  # relative path -> sha256; the shard file first
    timings: dict = field(default_factory=dict)
    selection: dict = field(default_factory=dict)  # attrition: accepted, candidates, rejected_by


def part_size(recipe: Recipe) -> int:
    """Systems per unit of work: a shard (``output.shard_size``), or a field (``field.lenses``)."""
    return recipe.field.lenses if recipe.field is not None else recipe.output.shard_size


def shard_plan(recipe: Recipe) -> list[ShardSpec]:
    """The units of work of a run: shards of cutouts, or the fields of a field run."""
    size = part_size(recipe)
    return [ShardSpec(i, first, min(size, recipe.count - first))
            for i, first in enumerate(range(0, recipe.count, size))]


def _digits(n: int) -> int:
    return max(5, len(str(max(n - 1, 0))))


def shard_path(recipe: Recipe, index: int) -> str:
    """The file of unit ``index``: a shard, or in a field run the field image (see simlens.field)."""
    n_parts = -(-recipe.count // part_size(recipe))
    if recipe.field is not None:
        return f"fields/field_{index:0{_digits(n_parts)}d}.fits"
    return f"shards/shard_{index:0{_digits(n_parts)}d}.fits"


def cutout_path(recipe: Recipe, system_id: int) -> str:
    return f"cutouts/system_{system_id:0{max(6, _digits(recipe.count))}d}.fits"


def render_shard(recipe: Recipe, run_folder: str | Path, spec: ShardSpec) -> ShardResult:
    """Render the systems of ``spec`` and write them under ``run_folder``; return the checksums.

    Parallelism is across shards, so GalSim's own OpenMP threads are set to one (several worker
    processes each running several threads would only contend for the cores)."""
    with reported_as(f"shard {spec.index} (systems {spec.first_system}-{spec.first_system + spec.n_systems - 1})"):
        return _render_shard(recipe, Path(run_folder), spec)


def _render_shard(recipe: Recipe, run_folder: Path, spec: ShardSpec) -> ShardResult:
    galsim.set_omp_threads(1)
    sampler = PopulationSampler(recipe)
    survey, output = recipe.survey, recipe.output
    nb, n = len(survey.bands), survey.cutout_size
    shape = (spec.n_systems, nb, n, n)
    cubes = {"IMAGES": np.zeros(shape, np.float32), "MASK": np.zeros(shape, np.uint8)}
    if output.noiseless:
        cubes["SOURCE"] = np.zeros(shape, np.float32)
        cubes["LENS"] = np.zeros(shape, np.float32)
    if output.variance:
        cubes["VARIANCE"] = np.zeros(shape, np.float32)
    crowded = recipe.neighbours is not None
    if crowded and output.noiseless:
        cubes["NEIGHBOURS"] = np.zeros(shape, np.float32)
    epochs = sampler.epochs
    if epochs is not None:
        cubes["EPOCH_IMAGES"] = np.zeros((spec.n_systems, len(epochs), n, n), np.float32)
        cubes["EPOCH_DIFFERENCE"] = np.zeros((spec.n_systems, len(epochs), n, n), np.float32)
        cubes["REFERENCE"] = np.zeros(shape, np.float32)
        if output.noiseless:
            cubes["EPOCH_POINTS"] = np.zeros((spec.n_systems, len(epochs), n, n), np.float32)
    psf_cube = None
    rows, subhalos, images, los, neighbours, light_curves, files = [], [], [], [], [], [], {}
    attrition: dict = {}
    shard_file = shard_path(recipe, spec.index)
    timings = dict.fromkeys(STAGES + ("writing",), 0.0)
    ids = range(spec.first_system, spec.first_system + spec.n_systems)
    for k, rendered in enumerate(rendered_systems(sampler, ids, timings)):
        system_id = rendered.system.system_id
        merge_attrition(attrition, rendered.system.rejections)
        t1 = time.perf_counter()
        for b, observed in enumerate(rendered.bands):
            cubes["IMAGES"][k, b] = observed.image
            cubes["MASK"][k, b] = observed.source_mask(output.mask_threshold)
            if output.noiseless:
                cubes["SOURCE"][k, b] = observed.lensed_source
                cubes["LENS"][k, b] = observed.lens_light
            if output.variance:
                cubes["VARIANCE"][k, b] = observed.variance
            if "NEIGHBOURS" in cubes and observed.neighbours is not None:
                cubes["NEIGHBOURS"][k, b] = observed.neighbours
            if psf_cube is None:
                psf_cube = np.zeros((spec.n_systems, nb) + observed.psf.shape, np.float32)
            psf_cube[k, b] = observed.psf
        if epochs is not None:
            cubes["EPOCH_IMAGES"][k] = rendered.epochs.images
            cubes["EPOCH_DIFFERENCE"][k] = rendered.epochs.difference
            if "EPOCH_POINTS" in cubes:
                cubes["EPOCH_POINTS"][k] = rendered.epochs.points
            for b, band in enumerate(survey.band_names):
                cubes["REFERENCE"][k, b] = rendered.epochs.reference[band]
            light_curves += rendered.epochs.light_curve_rows
        relative = shard_file  # the file holding this system's images: its own cutout, or the shard
        if output.per_system_files:
            relative = cutout_path(recipe, system_id)
            write_cutout(rendered, run_folder / relative, run_name=recipe.name, variance=output.variance, epochs=epochs)
            files[relative] = None
        rows.append(truth_row(rendered, relative, shard=shard_file, shard_index=k,
                              flags=rendered.system.selection_flags, cut_names=recipe.selection.cut_names))
        subhalos += subhalo_rows(rendered)
        images += image_rows(rendered)
        los += line_of_sight_rows(rendered)
        neighbours += neighbour_rows(rendered)
        timings["writing"] += time.perf_counter() - t1
    t2 = time.perf_counter()
    cubes["PSF"] = psf_cube
    header = {"RUNNAME": (recipe.name[:68], "simlens run"), "SHARD": (spec.index, "shard index"),
              "FIRSTID": (spec.first_system, "system id of the first row"),
              "NSYSTEM": (spec.n_systems, "systems in this shard"),
              "BANDS": (",".join(survey.band_names), "bands along the second axis"),
              "PIXSCALE": (survey.pixel_scale, "[arcsec/pixel] pixel scale"),
              "BUNIT": ("adu", "units of IMAGES, SOURCE, LENS (VARIANCE: adu2)"),
              "MASKTHR": (output.mask_threshold, "MASK: source > MASKTHR x pixel noise sigma")}
    tables = {"SUBHALOS": subhalo_table(subhalos, survey.band_names), "IMAGE_TRUTH": image_table(images),
              "LINE_OF_SIGHT": line_of_sight_table(los, survey.band_names)}
    if crowded:
        tables["NEIGHBOUR_TRUTH"] = objects_table(neighbours, survey.band_names, NEIGHBOUR_COLUMNS)
    if epochs is not None:
        tables["EPOCHS"] = epoch_table(epochs)
        tables["LIGHT_CURVES"] = light_curve_table(light_curves)
        header["NEPOCHS"] = (len(epochs), "epochs along the second axis of EPOCH_IMAGES")
    write_shard(run_folder / shard_file, cubes, truth_table(rows), header, extra_tables=tables)
    checksums = {shard_file: sha256_of(run_folder / shard_file)}
    for relative in files:
        checksums[relative] = sha256_of(run_folder / relative)
    timings["writing"] += time.perf_counter() - t2
    return ShardResult(spec=spec, files=checksums, timings=timings, selection=attrition)

