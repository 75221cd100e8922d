"""The mass models a recipe can choose for its lens galaxies (``[lens.mass] model``): one registry.

Each :class:`LensModel` declares what the rest of simlens needs to know about it:

- ``recipe_keys``: the keys of ``[lens.mass]`` that only this model reads, by the truth field
  (:class:`~simlens.truth.record.System`) their drawn value goes to; other models refuse them;
- ``parameters``: the builder's arguments, by the truth field each is read from;
- ``build(einstein_radius, q, angle, **parameters)``: the deflector (None when there is nothing to
  deflect, e.g. a solved model whose source lies in front of the lens).

The recipe schema's choice list, the recipe checks, the sampler and the truth record all read this
registry; adding a model is one module in ``lensing/mass/`` plus one entry here (see DEVELOPERS.md).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Callable, Mapping

from .mass import (NFW, SIE, SIS, ConvergenceSheet, CoredIsothermal, ExternalShear, MassModel, Multipole, PowerLaw,
                   SersicMass, TruncatedSIS)
from .multiplane import MultiPlaneLens

__all__ = ["LensModel", "LENS_MODELS", "TRUTH_DEFAULTS", "build_deflector", "multi_plane"]


@dataclass(frozen=True)
class LensModel:
    name: str
    description: str
    build: Callable[..., MassModel | None]
    recipe_keys: Mapping[str, str] = field(default_factory=dict)  # truth field -> [lens.mass] key
    parameters: Mapping[str, str] = field(default_factory=dict)  # build argument -> truth field
    solves_einstein_radius: bool = False  # theta_E follows from the model (not from sigma)

    def parameters_of(self, truth) -> dict:
        """The builder's arguments, read from a truth record (any object with those fields)."""
        return {argument: getattr(truth, name) for argument, name in self.parameters.items()}


# The value a model-specific truth field takes for the other models.
TRUTH_DEFAULTS = {"mass_slope": 2.0, "mass_core_radius": 0.0}


def _sie(einstein_radius, q, angle):
    return SIE(einstein_radius=einstein_radius, q=q, angle=angle) if einstein_radius > 0 else None


def _power_law(einstein_radius, q, angle, slope):
    return PowerLaw(einstein_radius=einstein_radius, slope=slope, q=q, angle=angle) if einstein_radius > 0 else None


def _cored(einstein_radius, q, angle, core_radius):
    return (CoredIsothermal(einstein_radius=einstein_radius, core_radius=core_radius, q=q, angle=angle)
            if einstein_radius > 0 else None)


def _stars_and_halo(einstein_radius, q, angle, kappa_e, r_e, n, stellar_q, stellar_angle, kappa_s, scale_radius,
                    ellipticity):
    if kappa_e <= 0:  # not solved: the source is not behind the lens
        return None
    return (SersicMass(kappa_e=kappa_e, half_light_radius=r_e, sersic_index=n, q=stellar_q, angle=stellar_angle)
            + NFW(kappa_s=kappa_s, scale_radius=scale_radius, ellipticity=ellipticity, angle=angle))


LENS_MODELS: dict[str, LensModel] = {m.name: m for m in (
    LensModel("sie", "singular isothermal ellipsoid", _sie),
    LensModel("power_law", "elliptical power law of free 3D slope", _power_law,
              recipe_keys={"mass_slope": "slope"}, parameters={"slope": "mass_slope"}),
    LensModel("cored_isothermal", "non-singular isothermal ellipsoid", _cored,
              recipe_keys={"mass_core_radius": "core_radius"}, parameters={"core_radius": "mass_core_radius"}),
    LensModel("stars_and_halo", "Sersic stars following the light plus an NFW halo; theta_E solved", _stars_and_halo,
              recipe_keys={"halo_mass": "halo_mass", "halo_concentration": "concentration",
                           "halo_ellipticity": "halo_ellipticity"},
              parameters={"kappa_e": "stellar_kappa_e", "r_e": "lens_half_light_radius", "n": "lens_sersic_index",
                          "stellar_q": "lens_q", "stellar_angle": "lens_angle", "kappa_s": "halo_kappa_s",
                          "scale_radius": "halo_scale_radius", "ellipticity": "halo_ellipticity"},
              solves_einstein_radius=True),
)}


def build_deflector(truth) -> MassModel:
    """The main lens plane of a system from its truth values: the recipe's mass model (from
    :data:`~simlens.lensing.lens_models.LENS_MODELS`), subhalos, multipoles, external shear.
    ``truth`` is a :class:`~simlens.truth.record.System` or any object with its mass fields.  Nothing deflects (a
    zero convergence sheet) when ``lensing`` is false or the model has nothing to build."""
    if not getattr(truth, "lensing", True):
        return ConvergenceSheet(kappa=0.0)
    theta_e, angle = truth.einstein_radius, truth.mass_angle
    model = LENS_MODELS[truth.mass_model_name]
    lens = model.build(theta_e, truth.mass_q, angle, **model.parameters_of(truth))
    if lens is None:
        return ConvergenceSheet(kappa=0.0)
    for sub in truth.subhalos:
        lens = lens + TruncatedSIS(einstein_radius=sub.einstein_radius, truncation_radius=sub.truncation_radius,
                                   center=(sub.x, sub.y))
    for order, strength, relative_angle in (truth.multipoles if theta_e > 0 else ()):
        lens = lens + Multipole(order=order, strength=strength, einstein_radius=theta_e, angle=angle + relative_angle)
    if truth.shear_gamma > 0:
        lens = lens + ExternalShear(gamma=truth.shear_gamma, angle=truth.shear_angle)
    return lens


def multi_plane(main: MassModel, z_lens: float, line_of_sight: tuple, z_source: float, cosmology) -> MassModel:
    """The main deflector and the line-of-sight SIS galaxies as a multi-plane lens (planes in
    redshift order; every plane's model normalised for the source, as simlens.multiplane expects)."""
    planes = [(z_lens, main)] + [(g.z, SIS(einstein_radius=g.einstein_radius, center=(g.x, g.y)))
                                 for g in line_of_sight]
    planes.sort(key=lambda p: p[0])
    return MultiPlaneLens(planes=tuple(m for _, m in planes), redshifts=tuple(z for z, _ in planes),
                          z_source=z_source, cosmology=cosmology)
