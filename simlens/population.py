"""Drawing systems: one :class:`System` per ``system_id`` from a recipe.

A System holds plain numbers only -- the truth of one lens, its source, and the observing
conditions in every band -- and builds the model objects (mass, lens light, source light) the
renderer needs.  Drawing is deterministic in ``(recipe.seed, system_id)`` (see
:mod:`simlens.sampling`): ``PopulationSampler(recipe).draw(i)`` gives the same system whichever
process asks and whatever it drew before.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Mapping

import numpy as np

from .cosmology import critical_surface_density, einstein_radius_sis, ARCSEC_PER_RADIAN
from .light import CompositeLight, LightProfile, Sersic
from .mass import SIE, CoredIsothermal, ExternalShear, MassModel, Multipole, PowerLaw, TruncatedSIS
from .recipe import Recipe
from .sampling import Grid, grid_cell, system_streams
from .survey import BandConditions

__all__ = ["System", "Clump", "Subhalo", "PopulationSampler", "offset_on_sky"]

# Named random streams of a system; append new names at the end to keep old draws unchanged.
STREAMS = ("parameters", "placement", "clumps", "sky", "noise", "subhalos")

CLUMP_SERSIC_INDEX = 0.5  # Gaussian clumps


@dataclass(frozen=True)
class Clump:
    """A compact knot of the source: offset from the source centre (arcsec, source plane), size,
    and magnitude per band."""

    x: float
    y: float
    half_light_radius: float
    magnitudes: Mapping[str, float]


@dataclass(frozen=True)
class Subhalo:
    """A truncated-SIS subhalo: position (arcsec, image plane), mass (M_sun), Einstein radius b and
    truncation radius a (arcsec)."""

    x: float
    y: float
    mass: float
    einstein_radius: float
    truncation_radius: float


@dataclass(frozen=True)
class System:
    """The truth of one lens system (plain values; all angles in degrees CCW from +x, positions in
    arcsec relative to the cutout centre, where the lens sits)."""

    system_id: int
    grid_cell: tuple
    ra: float
    dec: float
    z_lens: float
    z_source: float
    velocity_dispersion: float
    einstein_radius: float
    mass_q: float
    mass_angle: float
    mass_model_name: str
    mass_slope: float
    mass_core_radius: float
    multipoles: tuple  # of (order, strength, angle relative to the mass major axis)
    subhalos: tuple  # of Subhalo
    shear_gamma: float
    shear_angle: float
    lens_magnitudes: Mapping[str, float]
    lens_half_light_radius: float
    lens_sersic_index: float
    lens_q: float
    lens_angle: float
    source_disk_magnitudes: Mapping[str, float]
    source_half_light_radius: float
    source_sersic_index: float
    source_q: float
    source_angle: float
    source_x: float
    source_y: float
    clumps: tuple
    bands: tuple  # of BandConditions, in survey order
    noise_seeds: tuple  # one int per band, for GalSim's noise

    # -- models -------------------------------------------------------------------------------
    def mass_model(self) -> MassModel:
        """The deflector: the main profile (its Einstein radius is that of the SIS with the drawn
        velocity dispersion), multipoles, external shear."""
        theta_e, q, angle = self.einstein_radius, self.mass_q, self.mass_angle
        if self.mass_model_name == "power_law":
            lens = PowerLaw(einstein_radius=theta_e, slope=self.mass_slope, q=q, angle=angle)
        elif self.mass_model_name == "cored_isothermal":
            lens = CoredIsothermal(einstein_radius=theta_e, core_radius=self.mass_core_radius, q=q, angle=angle)
        else:
            lens = SIE(einstein_radius=theta_e, q=q, angle=angle)
        for sub in self.subhalos:
            lens = lens + TruncatedSIS(einstein_radius=sub.einstein_radius, truncation_radius=sub.truncation_radius,
                                       center=(sub.x, sub.y))
        for order, strength, relative_angle in self.multipoles:
            lens = lens + Multipole(order=order, strength=strength, einstein_radius=theta_e,
                                    angle=angle + relative_angle)
        if self.shear_gamma > 0:
            lens = lens + ExternalShear(gamma=self.shear_gamma, angle=self.shear_angle)
        return lens

    def band(self, name: str) -> BandConditions:
        for b in self.bands:
            if b.name == name:
                return b
        raise KeyError(f"system {self.system_id} has no band {name!r}")

    def lens_light(self, band: str) -> Sersic:
        counts = self.band(band).counts_from_magnitude(self.lens_magnitudes[band])
        return Sersic(flux=counts, half_light_radius=self.lens_half_light_radius,
                      sersic_index=self.lens_sersic_index, q=self.lens_q, angle=self.lens_angle)

    def source_light(self, band: str) -> LightProfile:
        """The unlensed source in the source plane (disk plus clumps), in counts."""
        conditions = self.band(band)
        disk = Sersic(flux=conditions.counts_from_magnitude(self.source_disk_magnitudes[band]),
                      half_light_radius=self.source_half_light_radius, sersic_index=self.source_sersic_index,
                      q=self.source_q, angle=self.source_angle, center=(self.source_x, self.source_y))
        if not self.clumps:
            return disk
        knots = tuple(
            Sersic(flux=conditions.counts_from_magnitude(c.magnitudes[band]), half_light_radius=c.half_light_radius,
                   sersic_index=CLUMP_SERSIC_INDEX, center=(self.source_x + c.x, self.source_y + c.y))
            for c in self.clumps)
        return CompositeLight((disk,) + knots)

    def source_magnitude(self, band: str) -> float:
        """Total unlensed magnitude of the source (disk plus clumps) in ``band``."""
        flux = 10 ** (-0.4 * self.source_disk_magnitudes[band])
        flux += sum(10 ** (-0.4 * c.magnitudes[band]) for c in self.clumps)
        return -2.5 * math.log10(flux)


def offset_on_sky(ra0: float, dec0: float, position_angle: float, separation: float) -> tuple[float, float]:
    """The point at ``separation`` (deg) from (ra0, dec0) towards ``position_angle`` (deg east of
    north), on the sphere (spherical trigonometry; astropy's SkyCoord.directional_offset_by is the
    reference in the tests)."""
    d0, pa, s = math.radians(dec0), math.radians(position_angle), math.radians(separation)
    sin_dec = math.sin(d0) * math.cos(s) + math.cos(d0) * math.sin(s) * math.cos(pa)
    dec = math.asin(max(-1.0, min(1.0, sin_dec)))
    dra = math.atan2(math.sin(pa) * math.sin(s) * math.cos(d0), math.cos(s) - math.sin(d0) * sin_dec)
    return (ra0 + math.degrees(dra)) % 360.0, math.degrees(dec)


class PopulationSampler:
    """Draws :class:`System` objects from a recipe.

    >>> sampler = PopulationSampler(recipe)
    >>> system = sampler.draw(7)      # identical every time, in any process
    """

    def __init__(self, recipe: Recipe):
        self.recipe = recipe
        self.cosmology = recipe.cosmology.build()
        self._parameters = list(recipe.parameters())
        self._grid_paths = [path for path, p in self._parameters if isinstance(p, Grid)]
        self._grid_shape = recipe.grid_shape

    @property
    def n_grid_cells(self) -> int:
        return int(math.prod(self._grid_shape)) if self._grid_shape else 1

    def draw_parameters(self, system_id: int, streams) -> tuple[dict, tuple]:
        """Every recipe parameter's value for this system, keyed by key path."""
        cell = grid_cell(system_id, self._grid_shape)
        cell_of = dict(zip(self._grid_paths, cell))
        rng = streams["parameters"]
        values = {}
        for path, param in self._parameters:
            if isinstance(param, Grid):
                values[path] = float(param.at(cell_of[path]))
            else:
                values[path] = float(param.draw(rng))
        return values, cell

    def _draw_subhalos(self, v: dict, theta_e: float, z_lens: float, z_source: float, rng) -> tuple:
        """Masses from dN/dm ~ m^slope on [mass_min, mass_max] (inverse CDF), positions uniform in
        area in the annulus [annulus, annulus_outer] theta_E around the lens centre."""
        n = int(round(v["lens.subhalos.count"]))
        if n == 0:
            return ()
        settings = self.recipe.lens.subhalos
        k = settings.mass_function_slope + 1.0
        lo, hi = settings.mass_min ** k, settings.mass_max ** k
        masses = (lo + rng.uniform(size=n) * (hi - lo)) ** (1.0 / k)
        r_in, r_out = v["lens.subhalos.annulus"] * theta_e, v["lens.subhalos.annulus_outer"] * theta_e
        radii = np.sqrt(r_in**2 + rng.uniform(size=n) * (r_out**2 - r_in**2))
        phi = rng.uniform(0.0, 2.0 * math.pi, size=n)
        sigma_cr = critical_surface_density(self.cosmology, z_lens, z_source).value  # M_sun / Mpc^2
        d_l = self.cosmology.angular_diameter_distance(z_lens).value  # Mpc
        sigma_cr_arcsec2 = sigma_cr * (d_l / ARCSEC_PER_RADIAN) ** 2  # M_sun / arcsec^2
        return tuple(_subhalo(float(m), float(r * math.cos(p)), float(r * math.sin(p)), theta_e, sigma_cr_arcsec2)
                     for m, r, p in zip(masses, radii, phi))

    def draw(self, system_id: int) -> System:
        if system_id < 0:
            raise ValueError(f"system_id must be >= 0, got {system_id}")
        recipe = self.recipe
        streams = system_streams(recipe.seed, system_id, STREAMS)
        v, cell = self.draw_parameters(system_id, streams)
        ref = recipe.reference_band
        band_names = recipe.survey.band_names

        def magnitudes(base: float, prefix: str) -> dict:
            return {b: base + (0.0 if b == ref else v[f"{prefix}.{b}"]) for b in band_names}

        z_lens, z_source = v["lens.redshift"], v["source.redshift"]
        sigma = v["lens.velocity_dispersion"]
        theta_e = einstein_radius_sis(sigma, z_lens, z_source, self.cosmology)

        # Source position (source plane, relative to the lens centre).
        pos = recipe.source.position
        if pos.x is not None:
            source_x, source_y = v["source.position.x"], v["source.position.y"]
        else:
            radius_factor = v.get("source.position.radius_in_einstein_radii", DEFAULT_RADIUS_IN_EINSTEIN_RADII)
            rng = streams["placement"]
            r = radius_factor * theta_e * math.sqrt(rng.uniform())  # uniform in area
            phi = rng.uniform(0.0, 2.0 * math.pi)
            source_x, source_y = r * math.cos(phi), r * math.sin(phi)

        # Source disk and clumps: the source magnitude is the total (disk + clumps) in the reference band.
        source_total = magnitudes(v["source.magnitude"], "source.colors")
        n_clumps = int(round(v["source.clumps.count"]))
        clump_fraction = v["source.clumps.flux_fraction"] if n_clumps > 0 else 0.0
        source_r_e = v["source.half_light_radius"]
        disk_mags = {b: m - 2.5 * math.log10(1.0 - clump_fraction) for b, m in source_total.items()}
        clumps = ()
        if n_clumps > 0:
            rng = streams["clumps"]
            weights = rng.uniform(0.5, 1.5, size=n_clumps)
            weights = weights / weights.sum()
            offsets = rng.normal(0.0, v["source.clumps.spread"] * source_r_e, size=(n_clumps, 2))
            clump_colors = ("source.clumps.colors" if recipe.source.clumps.colors else "source.colors")
            clump_ref_mag = v["source.magnitude"] - 2.5 * math.log10(clump_fraction)
            clumps = tuple(
                Clump(x=float(dx), y=float(dy), half_light_radius=v["source.clumps.half_light_radius"],
                      magnitudes={b: m - 2.5 * math.log10(w)
                                  for b, m in magnitudes(clump_ref_mag, clump_colors).items()})
                for (dx, dy), w in zip(offsets, weights))

        # Sky position: uniform in area inside the footprint's spherical cap.
        fp = recipe.footprint
        rng = streams["sky"]
        cos_sep = 1.0 - rng.uniform() * (1.0 - math.cos(math.radians(fp.radius)))
        ra, dec = offset_on_sky(fp.ra, fp.dec, rng.uniform(0.0, 360.0), math.degrees(math.acos(cos_sep)))

        bands = tuple(
            BandConditions(
                name=b.name, pixel_scale=recipe.survey.pixel_scale,
                zero_point=v[f"survey.bands.{b.name}.zero_point"],
                sky_brightness=v[f"survey.bands.{b.name}.sky_brightness"],
                exposure_time=v[f"survey.bands.{b.name}.exposure_time"],
                gain=v[f"survey.bands.{b.name}.gain"],
                read_noise=v[f"survey.bands.{b.name}.read_noise"],
                psf_profile=b.psf.profile,
                psf_fwhm=v[f"survey.bands.{b.name}.psf.fwhm"],
                psf_beta=v[f"survey.bands.{b.name}.psf.beta"])
            for b in recipe.survey.bands)
        noise_seeds = tuple(int(s) for s in streams["noise"].integers(1, 2**31 - 1, size=len(bands)))
        subhalos = self._draw_subhalos(v, theta_e, z_lens, z_source, streams["subhalos"])

        return System(
            system_id=int(system_id), grid_cell=cell, ra=ra, dec=dec, z_lens=z_lens, z_source=z_source,
            velocity_dispersion=sigma, einstein_radius=theta_e,
            mass_q=v["lens.mass.q"], mass_angle=v["lens.mass.angle"],
            mass_model_name=recipe.lens.mass.model,
            mass_slope=v["lens.mass.slope"] if recipe.lens.mass.model == "power_law" else 2.0,
            mass_core_radius=v["lens.mass.core_radius"] if recipe.lens.mass.model == "cored_isothermal" else 0.0,
            multipoles=tuple((m, v[f"lens.multipoles.m{m}_strength"], v[f"lens.multipoles.m{m}_angle"])
                             for m in (3, 4) if v[f"lens.multipoles.m{m}_strength"] != 0.0),
            subhalos=subhalos,
            shear_gamma=v["lens.shear.gamma"], shear_angle=v["lens.shear.angle"],
            lens_magnitudes=magnitudes(v["lens.light.magnitude"], "lens.light.colors"),
            lens_half_light_radius=v["lens.light.half_light_radius"],
            lens_sersic_index=v["lens.light.sersic_index"], lens_q=v["lens.light.q"],
            lens_angle=v["lens.light.angle"],
            source_disk_magnitudes=disk_mags, source_half_light_radius=source_r_e,
            source_sersic_index=v["source.sersic_index"], source_q=v["source.q"], source_angle=v["source.angle"],
            source_x=source_x, source_y=source_y, clumps=clumps, bands=bands, noise_seeds=noise_seeds)


def _subhalo(mass: float, x: float, y: float, theta_e: float, sigma_cr_arcsec2: float) -> "Subhalo":
    """A truncated SIS of total mass ``pi Sigma_cr b a`` with the tidal truncation ``a = sqrt(b theta_E)``
    of an SIS subhalo in an SIS host (Metcalf & Madau 2001, from memory); solved for b."""
    b = (mass / (math.pi * sigma_cr_arcsec2 * math.sqrt(theta_e))) ** (2.0 / 3.0)
    return Subhalo(x=x, y=y, mass=mass, einstein_radius=b, truncation_radius=math.sqrt(b * theta_e))


# When neither x/y nor radius_in_einstein_radii is given, sources fall uniformly in area inside one
# Einstein radius (for an SIS that is exactly the multiply-imaged region; common practice).
DEFAULT_RADIUS_IN_EINSTEIN_RADII = 1.0
