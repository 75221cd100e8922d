"""Selection cuts on the truth, and the attrition they cause.

Cuts come from the recipe's ``[selection]`` table.  Those that need no images (``einstein_radius``,
``resolvable``, ``multiply_imaged``, and the geometry of the placement mode) are applied while a
system is drawn (:class:`simlens.truth.sampler.PopulationSampler`); those on rendered images
(``magnification``, ``n_images``, ``arc_snr``) are judged by :func:`image_cut_results`, which the
run stage hands to the sampler (:mod:`simlens.runs.rendering`).  With ``enforce = true`` a failing
candidate is replaced by the system's next candidate, so a run always holds the requested
number of systems; with ``enforce = false`` every candidate is kept and the cuts only set the
``passes_<cut>`` flags of the truth.  The number of candidates each cut rejected is summed over the
run into the manifest (``selection``) and the command-line summary.
"""

from __future__ import annotations

from typing import Mapping

from ..recipe import Recipe

__all__ = ["image_cut_results", "needs_images", "merge_attrition", "sum_attrition", "describe_attrition"]


def needs_images(recipe: Recipe) -> bool:
    """Whether the recipe has cuts judged on rendered images."""
    sel = recipe.selection
    return sel.min_magnification is not None or sel.min_images is not None or sel.min_arc_snr is not None


def image_cut_results(rendered, recipe: Recipe) -> dict[str, bool]:
    """Pass/fail of the image-based cuts the recipe asks for, on a
    :class:`~simlens.imaging.render.RenderedSystem`."""
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

