"""Draw a unit of work's systems and render them: the loop that shards and fields share.

The truth of the whole unit is drawn first, on arrays (:meth:`PopulationSampler.draw_many`).  A
recipe with cuts on images renders each candidate inside that draw, first in the bands its cuts
need only, so that a candidate failing them is replaced by the system's next one (within the same
``selection.max_candidates``) before its other bands cost anything.
"""

from __future__ import annotations

import dataclasses
import time
from typing import Iterator, Sequence

from ..errors import reported_as
from ..imaging.epochs import EpochRenderer
from ..imaging.render import RenderedSystem, SystemRendering
from ..truth.sampler import PopulationSampler
from ..truth.selection import image_cut_results, needs_images

__all__ = ["rendered_systems", "STAGES"]

# The stages a unit's time is reported in (seconds, in the manifest's seconds_by_stage).
STAGES = ("sampling", "ray_tracing", "image_finding", "adaptive_refinement", "scene", "galsim_stage", "epochs")


def rendered_systems(sampler: PopulationSampler, system_ids: Sequence[int], timings: dict) -> Iterator[RenderedSystem]:
    """The rendered systems ``system_ids``, in order, each carrying its final truth record
    (rejections and selection flags included) and, in a run with epochs, its epoch images; adds
    the time of each stage to ``timings``."""
    recipe = sampler.recipe
    epochs = EpochRenderer(sampler.epochs) if sampler.epochs is not None else None
    widest = sampler.epochs.widest_fwhm if sampler.epochs is not None else 0.0
    survey, reference = recipe.survey, recipe.reference_band
    selection = recipe.selection
    cut_bands = set()
    if selection.min_magnification is not None:
        cut_bands.add(reference)
    if selection.min_arc_snr is not None:
        cut_bands.add(selection.arc_snr_band or reference)
    judged: dict[int, SystemRendering] = {}
    spent: list[SystemRendering] = []  # every rendering made, its stage times counted at the end

    def judge(system) -> dict[str, bool]:
        rendering = SystemRendering(system, survey, reference, widest)
        spent.append(rendering)
        judged[system.system_id] = rendering
        return image_cut_results(rendering.render(cut_bands, images=selection.min_images is not None), recipe)

    t0 = time.perf_counter()
    with reported_as(f"drawing systems {system_ids[0]}-{system_ids[-1]}" if len(system_ids) else "drawing"):
        systems = sampler.draw_many(system_ids, image_cuts=judge if needs_images(recipe) else None)
    drawing = time.perf_counter() - t0
    timings["sampling"] = timings.get("sampling", 0.0) + drawing - sum(sum(r.timings.values()) for r in spent)
    for rendering in spent:
        if judged.get(rendering.system.system_id) is not rendering:  # a rejected candidate
            _add(timings, rendering.timings)
    for system in systems:
        with reported_as(f"rendering system {system.system_id}"):
            rendering = judged.pop(system.system_id, None) or SystemRendering(system, survey, reference, widest)
            rendered = rendering.render()
            if epochs is not None:
                t0 = time.perf_counter()
                rendered = dataclasses.replace(rendered, epochs=epochs.render(rendering))
                timings["epochs"] = timings.get("epochs", 0.0) + time.perf_counter() - t0
        _add(timings, rendering.timings)
        yield dataclasses.replace(rendered, system=system)


def _add(timings: dict, more: dict) -> None:
    for key, value in more.items():
        timings[key] = timings.get(key, 0.0) + value
