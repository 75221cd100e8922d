"""From a truth record to the scene it describes: the deflectors and the light of every band.

:func:`build_scene` turns a :class:`~simlens.truth.record.System` (plain numbers) into one frozen
:class:`Scene`: the deflector of the first source (all lens planes), that of a second source
plane, and per band the lens light, the unlensed source light and the unlensed point-source flux,
in counts.  The renderer (:mod:`simlens.imaging.render`), and through it the shards, the fields
and the injection into real images, take a scene; each deflector is built once per scene.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace
from typing import Mapping

import numpy as np

from ..cosmology import distance_ratio
from ..lensing.lens_models import build_deflector, multi_plane
from ..lensing.mass import SIS, MassModel, ScaledDeflector
from ..lensing.lens_equation import find_images
from ..lensing.multiplane import MultiPlaneLens
from ..truth.record import System
from .light import CompositeLight, LightProfile, Sersic

__all__ = ["Scene", "build_scene", "lens_galaxy", "lens_galaxy_components", "CLUMP_SERSIC_INDEX"]

CLUMP_SERSIC_INDEX = 0.5  # Gaussian clumps
SATELLITE_SERSIC_INDEX = 1.0  # dwarf satellites: exponential disks (common practice)


@dataclass(frozen=True)
class Scene:
    """The models of one system, in counts per band (a band's name keys each mapping)."""

    system: System
    deflector: MassModel  # to the first source plane, every lens plane included
    lens_light: Mapping[str, LightProfile]  # the lens galaxy, with any look-alike features
    source_light: Mapping[str, LightProfile]  # the unlensed source galaxy (disk and clumps)
    point_flux: Mapping[str, float]  # counts of the unlensed point source at the source centre (0: none)
    second_deflector: MassModel | None = None  # to the second source plane
    second_source_light: Mapping[str, LightProfile] | None = None


def build_scene(system: System) -> Scene:
    """The scene of ``system`` (see the module docstring)."""
    names = [b.name for b in system.bands]
    main = build_deflector(system)
    deflector = main
    if system.line_of_sight and system.lensing:
        deflector = multi_plane(main, system.z_lens, system.line_of_sight, system.z_source, system.cosmology)
    second = system.second_source is not None
    seen = line_of_sight_images(system, main)
    return Scene(system=system, deflector=deflector,
                 lens_light={b: _lens_light(system, b, seen) for b in names},
                 source_light={b: _source_light(system, b) for b in names},
                 point_flux={b: _point_flux(system, b) for b in names},
                 second_deflector=_second_deflector(system, main) if second else None,
                 second_source_light={b: _second_source_light(system, b) for b in names} if second else None)


def lens_galaxy_components(system: System, band: str) -> tuple[Sersic, ...]:
    """The Sersic components of the lens galaxy's own light in ``band`` (counts): one, or a core
    and an envelope (``[lens.light.envelope]``); no look-alike features."""
    counts = system.band(band).counts_from_magnitude
    envelope = system.lens_envelope
    if envelope is None:
        return (Sersic(flux=counts(system.lens_magnitudes[band]), half_light_radius=system.lens_half_light_radius,
                       sersic_index=system.lens_sersic_index, q=system.lens_q, angle=system.lens_angle),)
    return (Sersic(flux=counts(envelope.core_magnitudes[band]), half_light_radius=envelope.core_half_light_radius,
                   sersic_index=system.lens_sersic_index, q=system.lens_q, angle=system.lens_angle),
            Sersic(flux=counts(envelope.magnitudes[band]), half_light_radius=envelope.half_light_radius,
                   sersic_index=envelope.sersic_index, q=envelope.q, angle=system.lens_angle))


def lens_galaxy(system: System, band: str) -> LightProfile:
    """The lens galaxy's own light in ``band`` (counts), without any look-alike features."""
    parts = lens_galaxy_components(system, band)
    return parts[0] if len(parts) == 1 else CompositeLight(parts)


def line_of_sight_images(system: System, main: MassModel) -> tuple:
    """``(galaxy, x, y, A)`` for each image of each line-of-sight galaxy with light: in front of the
    lens (or without lensing) the galaxy itself (A the identity); behind it, the images of its
    centre through the planes in front of it (the main deflector and nearer line-of-sight
    galaxies, each rescaled to its redshift, SEF 1992 eq. 5.7), with the lens mapping's Jacobian A
    there (:func:`simlens.lensing.lens_equation.find_images`)."""
    out = []
    for g in system.line_of_sight:
        if g.magnitudes is None:
            continue
        if not system.lensing or g.z <= system.z_lens:
            out.append((g, g.x, g.y, np.eye(2)))
            continue
        cosmo = system.cosmology
        planes = [(system.z_lens, main)] + [(o.z, SIS(einstein_radius=o.einstein_radius, center=(o.x, o.y)))
                                             for o in system.line_of_sight if o.z < g.z and o is not g]
        planes.sort(key=lambda p: p[0])
        scaled = tuple(ScaledDeflector(m, distance_ratio(cosmo, z, g.z) / distance_ratio(cosmo, z, system.z_source))
                       for z, m in planes)
        lens = scaled[0] if len(scaled) == 1 else MultiPlaneLens(
            planes=scaled, redshifts=tuple(z for z, _ in planes), z_source=g.z, cosmology=cosmo)
        reach = STRONG_LENSING_REACH * system.einstein_radius  # beyond it, one image (outside the caustics)
        if math.hypot(g.x, g.y) > reach:
            guess = np.array([g.x]), np.array([g.y])
            for _ in range(8):  # theta = beta + alpha(theta): converges where |d alpha| < 1
                ax, ay = lens.deflection(*guess)
                guess = g.x + ax, g.y + ay
            images = find_images(lens, g.x, g.y, [(0.3 * reach, 0.3 * reach / 20.0)],
                                 center=(float(guess[0][0]), float(guess[1][0])))
        else:
            half = math.hypot(g.x, g.y) + reach + 1.0
            images = find_images(lens, g.x, g.y, [(half, half / 200.0), (reach, reach / 100.0)])
        if len(images) == 0:
            continue
        _, _, psi_xx, psi_xy, psi_yy = lens.deflection_and_hessian(images.x, images.y)
        for j in range(len(images)):
            jacobian = np.array([[1.0 - psi_xx[j], -psi_xy[j]], [-psi_xy[j], 1.0 - psi_yy[j]]])
            out.append((g, float(images.x[j]), float(images.y[j]), jacobian))
    return tuple(out)


STRONG_LENSING_REACH = 3.0  # theta_E: the caustics of the recipes' deflectors lie within it (common practice)
MAX_LINEAR_MAGNIFICATION = 30.0  # images of line-of-sight galaxies: the linear mapping's limit


def mapped_sersic(flux: float, half_light_radius: float, sersic_index: float, q: float, angle: float,
                  x: float, y: float, jacobian: np.ndarray) -> Sersic:
    """An elliptical Sersic in its own plane seen through the linear lens mapping ``jacobian`` (A =
    d beta / d theta) at image position ``(x, y)``: surface brightness is conserved, so the
    isophotes' quadratic form Q (``R^2 = d^T Q d``, det Q = 1) becomes A^T Q A, the flux grows by
    1 / |det A| and the shape follows from the new form's eigenvalues.  Exact for a galaxy small
    against the scale on which A changes; near a critical curve, where that fails (a giant arc),
    |det A| is kept above 1 / MAX_LINEAR_MAGNIFICATION."""
    a = math.radians(angle)
    rotation = np.array([[math.cos(a), -math.sin(a)], [math.sin(a), math.cos(a)]])
    form = rotation @ np.diag([q, 1.0 / q]) @ rotation.T
    mapped = jacobian.T @ form @ jacobian
    values, vectors = np.linalg.eigh(mapped)  # ascending: the first is along the major axis
    scale = max(math.sqrt(values[0] * values[1]), 1.0 / MAX_LINEAR_MAGNIFICATION)  # |det A|
    major = vectors[:, 0]
    return Sersic(flux=flux / scale, half_light_radius=half_light_radius / math.sqrt(scale),
                  sersic_index=sersic_index, q=math.sqrt(values[0] / values[1]),
                  angle=math.degrees(math.atan2(major[1], major[0])), center=(x, y))


def _lens_light(system: System, band: str, line_of_sight: tuple = ()) -> LightProfile:
    """The lens galaxy, any look-alike features, the satellites of its subhalos and the images of
    the line-of-sight galaxies with light."""
    conditions = system.band(band)
    parts = lens_galaxy_components(system, band)
    parts += tuple(mapped_sersic(conditions.counts_from_magnitude(g.magnitudes[band]), g.half_light_radius,
                                 g.sersic_index, g.q, g.angle, x, y, jacobian) for g, x, y, jacobian in line_of_sight)
    parts += tuple(shape.with_flux(conditions.counts_from_magnitude(mags[band])) for shape, mags in system.extra_light)
    parts += tuple(Sersic(flux=conditions.counts_from_magnitude(h.magnitudes[band]), half_light_radius=h.half_light_radius,
                          sersic_index=SATELLITE_SERSIC_INDEX, center=(h.x, h.y))
                   for h in system.subhalos if h.magnitudes is not None)
    return parts[0] if len(parts) == 1 else CompositeLight(parts)


def _source_light(system: System, band: str) -> LightProfile:
    """A point source is not part of it: its images are found and placed by the renderer."""
    conditions = system.band(band)
    if not system.host or not system.source_present:
        return Sersic(flux=0.0, half_light_radius=system.source_half_light_radius,
                      center=(system.source_x, system.source_y))
    flux, center = conditions.counts_from_magnitude(system.source_disk_magnitudes[band]), (system.source_x, system.source_y)
    if system.source_stamp is not None:  # an image stamp, turned by the source's angle
        disk = replace(system.source_stamp, flux=flux, angle=system.source_angle, center=center)
    else:
        disk = Sersic(flux=flux, half_light_radius=system.source_half_light_radius,
                      sersic_index=system.source_sersic_index, q=system.source_q, angle=system.source_angle,
                      center=center)
    parts = (disk,)
    if system.source_bulge_magnitudes is not None and system.source_bulge_magnitudes[band] < float("inf"):
        parts += (Sersic(flux=conditions.counts_from_magnitude(system.source_bulge_magnitudes[band]),
                         half_light_radius=system.source_bulge_half_light_radius,
                         sersic_index=system.source_bulge_sersic_index, q=system.source_bulge_q,
                         angle=system.source_angle, center=center),)
    if not system.clumps:
        return parts[0] if len(parts) == 1 else CompositeLight(parts)
    knots = tuple(
        Sersic(flux=conditions.counts_from_magnitude(c.magnitudes[band]), half_light_radius=c.half_light_radius,
               sersic_index=CLUMP_SERSIC_INDEX, center=(system.source_x + c.x, system.source_y + c.y))
        for c in system.clumps)
    return CompositeLight(parts + knots)


def _point_flux(system: System, band: str) -> float:
    if system.quasar_magnitudes is None or not system.source_present:
        return 0.0
    return system.band(band).counts_from_magnitude(system.quasar_magnitudes[band])


def _second_deflector(system: System, main: MassModel) -> MassModel:
    """The main lens plane rescaled to the second source's redshift, any line-of-sight galaxies
    likewise, and the first source as an SIS in its plane."""
    second, cosmo = system.second_source, system.cosmology
    scaled = ScaledDeflector(main, second.deflection_factor)
    planes = [(system.z_lens, scaled)]
    for g in system.line_of_sight:
        factor = distance_ratio(cosmo, g.z, second.z) / distance_ratio(cosmo, g.z, system.z_source)
        planes.append((g.z, SIS(einstein_radius=g.einstein_radius * factor, center=(g.x, g.y))))
    if second.deflector_einstein_radius > 0:
        planes.append((system.z_source, SIS(einstein_radius=second.deflector_einstein_radius,
                                            center=(system.source_x, system.source_y))))
    if len(planes) == 1:
        return scaled
    planes.sort(key=lambda p: p[0])
    return MultiPlaneLens(planes=tuple(m for _, m in planes), redshifts=tuple(z for z, _ in planes),
                          z_source=second.z, cosmology=cosmo)


def _second_source_light(system: System, band: str) -> LightProfile:
    second = system.second_source
    return Sersic(flux=system.band(band).counts_from_magnitude(second.magnitudes[band]),
                  half_light_radius=second.half_light_radius, sersic_index=second.sersic_index,
                  q=second.q, angle=second.angle, center=(second.x, second.y))
