"""Selection cuts on the truth, and the attrition they cause.

Cuts come from the recipe's ``[selection]`` table.  Those that need no images (``einstein_radius``,
``resolvable``, ``multiply_imaged``, and the geometry of the placement mode) are applied while a
system is drawn (:class:`simlens.population.PopulationSampler`); those on rendered images
(``magnification``, ``n_images``, ``arc_snr``) here, after rendering.  With ``enforce = true`` a
failing candidate is replaced by the system's next candidate, so a run always holds the requested
number of systems; with ``enforce = false`` every candidate is kept and the cuts only set the
``passes_<cut>`` flags of the truth.  The number of candidates each cut rejected is summed over the
run into the manifest (``selection``) and the command-line summary.
"""

from __future__ import annotations

from typing import Mapping

from .sampler import PopulationSampler, SelectionExhausted, _exhausted_message
from ..recipe import Recipe
from ..imaging.render import RenderedSystem, render_system

__all__ = ["image_cut_results", "select_and_render", "merge_attrition", "sum_attrition", "describe_attrition"]


def image_cut_results(rendered: RenderedSystem, recipe: Recipe) -> dict[str, bool]:
    """Pass/fail of the image-based cuts the recipe asks for."""
    sel = recipe.selection
    out = {}
    if sel.min_magnification is not None:
        out["magnification"] = bool(rendered.magnification >= sel.min_magnification)
    if sel.min_images is not None:
        out["n_images"] = len(rendered.images) >= sel.min_images
    if sel.min_arc_snr is not None:
        band = sel.arc_snr_band or recipe.reference_band
        out["arc_snr"] = bool(rendered.band(band).arc_snr >= sel.min_arc_snr)
    return out


def select_and_render(sampler: PopulationSampler, system_id: int) -> tuple[RenderedSystem, dict]:
    """Render the first candidate of ``system_id`` that passes every cut; return it with the
    rejections of the earlier candidates, by cut (``enforce = false``: the first candidate)."""
    recipe = sampler.recipe
    sel = recipe.selection
    rejections: dict[str, int] = {}
    first = 0
    while True:
        system = sampler.draw(system_id, first_candidate=first)
        for name, n in system.rejections.items():
            rejections[name] = rejections.get(name, 0) + n
        rendered = render_system(system, recipe.survey, recipe.reference_band)
        results = image_cut_results(rendered, recipe)
        failed = next((name for name, ok in results.items() if not ok), None)
        # negatives are labelled non-lenses: the cuts flag them but never redraw them
        if failed is None or not sel.enforce or system.system_class != "lens":
            flags = dict(system.selection_flags)
            flags.update(results)
            return rendered, {"rejections": rejections, "flags": flags}
        rejections[failed] = rejections.get(failed, 0) + 1
        first = system.candidate + 1
        if first >= sel.max_candidates:
            raise SelectionExhausted(_exhausted_message(system_id, sel.max_candidates, rejections))


def merge_attrition(total: dict, rejections: Mapping[str, int], accepted: int = 1) -> dict:
    """Add one system's rejections to a running ``{"accepted", "candidates", "rejected_by"}``."""
    total["accepted"] = total.get("accepted", 0) + accepted
    by = total.setdefault("rejected_by", {})
    n = 0
    for name, count in rejections.items():
        by[name] = by.get(name, 0) + int(count)
        n += int(count)
    total["candidates"] = total.get("candidates", 0) + n + accepted
    return total


def sum_attrition(parts) -> dict:
    """The attrition of several shards together."""
    total = {"accepted": 0, "candidates": 0, "rejected_by": {}}
    for part in parts:
        total["accepted"] += part.get("accepted", 0)
        total["candidates"] += part.get("candidates", 0)
        for name, n in part.get("rejected_by", {}).items():
            total["rejected_by"][name] = total["rejected_by"].get(name, 0) + n
    return total


def describe_attrition(attrition: Mapping) -> str:
    candidates, accepted = attrition.get("candidates", 0), attrition.get("accepted", 0)
    if not candidates:
        return "selection: no candidates drawn"
    parts = ", ".join(f"{name} {n} ({n / candidates:.1%})"
                      for name, n in sorted(attrition.get("rejected_by", {}).items(), key=lambda kv: -kv[1]))
    return (f"selection: {accepted} accepted of {candidates} candidates (acceptance {accepted / candidates:.1%})"
            + (f"; rejected by {parts}" if parts else ""))

