"""Sources from image stamps ([source.stamps], simlens.populations.stamps, imaging.light.ImageLight).

Reference: a catalogue the test writes itself, Sersic stamps drawn by GalSim (galsim.Sersic sheared
to the axis ratio, drawn at 0.03"/pixel).  Lensed through an SIE, they must give the same images as
the analytic Sersic route within 1 % in flux and 2 % of the peak per pixel (the acceptance test of
the feature); GalSim's drawn flux fixes the stamp's normalisation.
"""

from __future__ import annotations

import galsim
import numpy as np
import pytest
from astropy.io import fits
from astropy.table import Table

import simlens
from simlens.errors import RecipeError
from simlens.imaging.light import ImageLight
from simlens.populations.stamps import half_light_radius
from simlens.recipe import parse_recipe

from .conftest import SMALL_RECIPE

SERSIC = dict(n=1.0, half_light_radius=0.3, q=0.6)


def write_catalogue(path, rows: int = 3, size: int = 128, scale: float = 0.03) -> None:
    profile = galsim.Sersic(n=SERSIC["n"], half_light_radius=SERSIC["half_light_radius"])
    profile = profile.shear(q=SERSIC["q"], beta=0.0 * galsim.degrees)
    stamp = profile.drawImage(nx=size, ny=size, scale=scale).array
    table = Table({"stamp": np.repeat(stamp[None], rows, axis=0).astype(np.float32),
                   "pixel_scale": np.full(rows, scale), "magnitude": np.full(rows, 23.0),
                   "band": ["F814W"] * rows, "redshift": np.linspace(1.0, 2.0, rows)})
    table.write(path)


def recipe_text(stamps: str = "") -> str:
    # a fixed Sersic source (n = 1, 0.3", q = 0.6) of 22.5 mag, no clumps, angle 35 deg
    text = SMALL_RECIPE.replace('half_light_radius = 0.25\n', 'half_light_radius = 0.3\nsersic_index = 1.0\n'
                                'q = 0.6\nangle = 35.0\n').replace("magnitude = { uniform = [22.0, 23.0] }",
                                                                    "magnitude = 22.5")
    text = text.replace("count = { choice = [0, 2] }", "count = 0").replace("cutout_size = 32", "cutout_size = 48")
    return text + stamps


def test_stamp_light_conserves_flux_and_compares_by_pixels():
    stamp = galsim.Exponential(half_light_radius=0.3).drawImage(nx=96, ny=96, scale=0.03).array
    light = ImageLight(flux=5.0, image=stamp, pixel_scale=0.03, angle=20.0, center=(0.2, -0.1))
    x, y = np.meshgrid(np.arange(-2.5, 2.5, 0.005), np.arange(-2.5, 2.5, 0.005))
    assert light.surface_brightness(x, y).sum() * 0.005**2 == pytest.approx(5.0, rel=1e-3)
    assert light.with_flux(1.0) == ImageLight(flux=1.0, image=stamp, pixel_scale=0.03, angle=20.0, center=(0.2, -0.1))
    assert hash(light.with_flux(1.0)) == hash(light.with_flux(1.0))
    # the measured half-light radius of a round exponential is its own (GalSim's)
    assert half_light_radius(stamp, 0.03) == pytest.approx(0.3, abs=0.03)


def test_lensed_stamps_equal_the_analytic_sersic_route(tmp_path):
    write_catalogue(tmp_path / "stamps.fits")
    with_stamps = parse_recipe(recipe_text('\n[source.stamps]\ncatalogue = "stamps.fits"\npsf_fwhm = 0.08\n'),
                               origin=str(tmp_path / "recipe.toml"))
    analytic = parse_recipe(recipe_text())
    simlens.run(with_stamps, tmp_path / "stamps")
    simlens.run(analytic, tmp_path / "sersic")
    compared, worst = 0, 0.0
    for shard in sorted((tmp_path / "sersic" / "shards").glob("*.fits")):
        with fits.open(shard) as a, fits.open(tmp_path / "stamps" / "shards" / shard.name) as b:
            expected, got = a["SOURCE"].data.astype(float), b["SOURCE"].data.astype(float)
            truth = b["TRUTH"].data
        assert np.all(truth["source_stamp"] >= 0) and np.allclose(truth["source_stamp_psf_fwhm"], 0.08)
        for k in range(expected.shape[0]):
            for band in range(expected.shape[1]):
                e, g = expected[k, band], got[k, band]
                assert g.sum() == pytest.approx(e.sum(), rel=0.01)  # flux (magnified), 1 %
                assert np.abs(g - e).max() < 0.02 * e.max()  # 2 % of the peak per pixel
                assert not np.array_equal(g, e)  # the stamp route was taken
                worst = max(worst, np.abs(g - e).max() / e.max(), abs(g.sum() / e.sum() - 1))
                compared += 1
    assert compared == 12
    print(f"stamps against the analytic Sersic: worst {worst:.2e} (of the flux or the peak)")


STAMP_PSF = 0.15  # arcsec FWHM: the stamps' own (Gaussian) PSF in the deconvolution tests


def write_real_galaxy_catalogue(folder, rows: int = 2, size: int = 128, scale: float = 0.03) -> None:
    """GalSim's real-galaxy catalogue format (the columns galsim.RealGalaxyCatalog reads): galaxy
    and PSF images in FITS files beside a table naming them; the galaxies are the Sersic of SERSIC
    seen through a Gaussian PSF of STAMP_PSF (drawn by GalSim in float64, pixel included)."""
    profile = galsim.Sersic(n=SERSIC["n"], half_light_radius=SERSIC["half_light_radius"])
    profile = profile.shear(q=SERSIC["q"], beta=0.0 * galsim.degrees)
    psf = galsim.Gaussian(fwhm=STAMP_PSF)
    galaxy = galsim.Convolve(profile, psf).drawImage(nx=size, ny=size, scale=scale, dtype=np.float64).array
    psf_image = psf.drawImage(nx=65, ny=65, scale=scale, dtype=np.float64).array
    fits.HDUList([fits.PrimaryHDU(galaxy)] + [fits.ImageHDU(galaxy) for _ in range(rows - 1)]).writeto(folder / "gal.fits")
    fits.HDUList([fits.PrimaryHDU(psf_image)] + [fits.ImageHDU(psf_image) for _ in range(rows - 1)]).writeto(
        folder / "psf.fits")
    Table({"ident": np.arange(rows), "gal_filename": ["gal.fits"] * rows, "PSF_filename": ["psf.fits"] * rows,
           "gal_hdu": np.arange(rows), "PSF_hdu": np.arange(rows), "pixel_scale": np.full(rows, scale),
           "noise_mean": np.zeros(rows), "noise_variance": np.full(rows, 1e-12), "mag": np.full(rows, 23.0),
           "band": ["F814W"] * rows, "weight": np.ones(rows), "stamp_flux": np.full(rows, galaxy.sum())}).write(
        folder / "real.fits")


def test_stamps_are_deconvolved_as_galsim_deconvolves_real_galaxies(tmp_path):
    # Reference library: GalSim.  The stamps (the Sersic through a 0.15" Gaussian PSF, 0.03"
    # pixels), deconvolved and re-convolved with a 0.06" Gaussian, equal the Sersic convolved with
    # that Gaussian (GalSim, no pixel) within 1 % of the peak per pixel, through GalSim's
    # real-galaxy catalogue (galsim.RealGalaxy deconvolves by its PSF images) and through a table
    # with psf_fwhm; kept as they are, they differ by about 20 %.
    from simlens.populations.stamps import load_stamps

    write_real_galaxy_catalogue(tmp_path)
    with fits.open(tmp_path / "gal.fits") as hdul:
        raw = np.array(hdul[0].data, dtype=float)
    Table({"stamp": np.repeat(raw[None], 2, axis=0), "pixel_scale": [0.03] * 2, "magnitude": [23.0] * 2,
           "band": ["F814W"] * 2}).write(tmp_path / "table.fits")
    profile = galsim.Sersic(n=SERSIC["n"], half_light_radius=SERSIC["half_light_radius"]).shear(
        q=SERSIC["q"], beta=0.0 * galsim.degrees)
    reference = galsim.Convolve(profile, galsim.Gaussian(fwhm=0.06)).drawImage(
        nx=128, ny=128, scale=0.03, method="no_pixel", dtype=np.float64).array
    real = load_stamps(str(tmp_path / "real.fits"), "galsim_real", 0.0, 0.06)
    table = load_stamps(str(tmp_path / "table.fits"), "table", STAMP_PSF, 0.06)
    kept = load_stamps(str(tmp_path / "real.fits"), "galsim_real", 0.0, None)
    assert len(real) == 2 and real.band == ("F814W", "F814W") and np.all(real.magnitude == 23.0)
    for catalogue in (real, table):
        assert np.abs(catalogue.stamps[0] - reference).max() < 0.01 * reference.max()
    unit = kept.stamps[0] / kept.stamps[0].sum() * reference.sum()
    assert np.abs(unit - reference).max() > 0.15 * reference.max()


def test_lensed_real_galaxy_stamps_deconvolved_equal_the_analytic_route(tmp_path):
    # The acceptance test through GalSim's real-galaxy format: deconvolved stamps lensed
    # through the SIE equal the analytic Sersic route within 1 % in flux and 2 % of the peak.
    write_real_galaxy_catalogue(tmp_path)
    stamps = parse_recipe(recipe_text('\n[source.stamps]\ncatalogue = "real.fits"\nformat = "galsim_real"\n'
                                      'deconvolve_to = 0.06\n'), origin=str(tmp_path / "recipe.toml"))
    simlens.run(stamps.with_overrides(count=3), tmp_path / "stamps")
    simlens.run(parse_recipe(recipe_text()).with_overrides(count=3), tmp_path / "sersic")
    shard = sorted((tmp_path / "sersic" / "shards").glob("*.fits"))[0]
    with fits.open(shard) as a, fits.open(tmp_path / "stamps" / "shards" / shard.name) as b:
        expected, got = a["SOURCE"].data.astype(float), b["SOURCE"].data.astype(float)
        assert np.allclose(b["TRUTH"].data["source_stamp_psf_fwhm"], 0.06)  # the resolution left
    for e, g in zip(expected.reshape(-1, *expected.shape[-2:]), got.reshape(-1, *got.shape[-2:])):
        assert g.sum() == pytest.approx(e.sum(), rel=0.01)
        assert np.abs(g - e).max() < 0.02 * e.max()


def test_deconvolving_table_stamps_needs_their_psf(tmp_path):
    write_catalogue(tmp_path / "stamps.fits")
    with pytest.raises(RecipeError, match="deconvolve_to.*psf_fwhm"):
        parse_recipe(recipe_text('\n[source.stamps]\ncatalogue = "stamps.fits"\ndeconvolve_to = 0.05\n'),
                     origin=str(tmp_path / "recipe.toml"))
    (tmp_path / "notreal.fits").write_bytes((tmp_path / "stamps.fits").read_bytes())
    with pytest.raises(RecipeError, match="real-galaxy catalogue"):
        parse_recipe(recipe_text('\n[source.stamps]\ncatalogue = "notreal.fits"\nformat = "galsim_real"\n'),
                     origin=str(tmp_path / "recipe.toml"))


def test_a_missing_or_malformed_catalogue_is_refused(tmp_path):
    text = recipe_text('\n[source.stamps]\ncatalogue = "nowhere.fits"\n')
    with pytest.raises(RecipeError, match="source.stamps.catalogue.*no such file"):
        parse_recipe(text, origin=str(tmp_path / "recipe.toml"))
    Table({"pixel_scale": [0.03], "magnitude": [23.0], "band": ["i"]}).write(tmp_path / "bad.fits")
    with pytest.raises(RecipeError, match="STAMPS"):
        parse_recipe(recipe_text('\n[source.stamps]\ncatalogue = "bad.fits"\n'), origin=str(tmp_path / "recipe.toml"))
    Table({"pixel_scale": [0.03], "magnitude": [23.0], "band": ["i"]}).write(tmp_path / "bad.csv")
    with pytest.raises(RecipeError, match="STAMPS"):  # a CSV table holds no stamps: one line, no traceback
        parse_recipe(recipe_text('\n[source.stamps]\ncatalogue = "bad.csv"\n'), origin=str(tmp_path / "recipe.toml"))


def test_random_knots_follow_the_disk_light():
    # galsim.RandomKnots places knots at random points of the disk's light: half of them within the
    # disk's half-light (elliptical) radius, by the definition of R_e (Graham & Driver 2005, eq. 1),
    # and their second moments flattened by the disk's axis ratio.
    from simlens.truth.sampler import PopulationSampler

    text = recipe_text().replace("count = 0", 'count = 50\nplacement = "disk"\nflux_fraction = 0.3')
    text = text.replace("count = 6", "count = 40")
    sampler = PopulationSampler(parse_recipe(text))
    knots = np.array([(c.x, c.y) for system in sampler.draw_many(range(40)) for c in system.clumps])
    assert len(knots) == 2000
    a = np.radians(35.0)
    along = knots[:, 0] * np.cos(a) + knots[:, 1] * np.sin(a)
    across = -knots[:, 0] * np.sin(a) + knots[:, 1] * np.cos(a)
    radius = np.sqrt(0.6 * along**2 + across**2 / 0.6)  # the elliptical radius of simlens.imaging.light
    inside = np.mean(radius < 0.3)
    assert abs(inside - 0.5) < 3 * np.sqrt(0.25 / len(knots))
    assert np.sqrt(np.mean(across**2) / np.mean(along**2)) == pytest.approx(0.6, rel=0.08)


def test_bulge_plus_disk_sources_carry_their_templates_colour_gradient():
    # Reference library: galsim.SED.calculateMagnitude (AB) of GalSim's CWW templates redshifted
    # through the LSST filters gives each component's g - r; the bulge (elliptical template, n = 4,
    # half the disk's R_e) makes the centre redder than the outskirts.
    from simlens.imaging.scene import build_scene
    from simlens.truth.sampler import PopulationSampler

    from .conftest import PHYSICAL_RECIPE

    text = PHYSICAL_RECIPE.replace("[source.clumps]\ncount = { choice = [0, 2] }", "[source.clumps]\ncount = 0")
    text += "\n[source.bulge]\nfraction = 0.4\nhalf_light_radius_ratio = 0.5\ntemplate = \"elliptical\"\n"
    sampler = PopulationSampler(parse_recipe(text))
    share = galsim.meta_data.share_dir
    filters = {b: galsim.Bandpass(f"LSST_{b}.dat", wave_type="nm").withZeropoint("AB") for b in "gr"}

    def colour(sed_file, z):
        sed = galsim.SED(f"{share}/SEDs/{sed_file}", wave_type="Ang", flux_type="flambda").atRedshift(z)
        return sed.calculateMagnitude(filters["g"]) - sed.calculateMagnitude(filters["r"])

    gradients = 0
    for system in sampler.draw_many(range(6)):
        bulge, disk, z = system.source_bulge_magnitudes, system.source_disk_magnitudes, system.z_source
        assert bulge["g"] - bulge["r"] == pytest.approx(colour("CWW_E_ext.sed", z), abs=0.02)
        assert disk["g"] - disk["r"] == pytest.approx(colour("CWW_Sbc_ext.sed", z), abs=0.02)
        # the light adds up to the drawn total, with the bulge's share in the anchor band (r)
        total = 10 ** (-0.4 * bulge["r"]) + 10 ** (-0.4 * disk["r"])
        assert 10 ** (-0.4 * bulge["r"]) / total == pytest.approx(0.4, rel=1e-9)
        assert system.source_magnitude("r") == pytest.approx(-2.5 * np.log10(total), abs=1e-9)
        scene = build_scene(system)
        g, r = scene.source_light["g"], scene.source_light["r"]
        assert g.flux == pytest.approx(system.band("g").counts_from_magnitude(system.source_magnitude("g")), rel=1e-9)
        x0, y0, r_e = system.source_x, system.source_y, system.source_half_light_radius
        inner = g.surface_brightness(x0, y0) / r.surface_brightness(x0, y0)
        outer = g.surface_brightness(x0 + 2 * r_e, y0) / r.surface_brightness(x0 + 2 * r_e, y0)
        if colour("CWW_E_ext.sed", z) > colour("CWW_Sbc_ext.sed", z) + 0.2:
            assert -2.5 * np.log10(inner / outer) > 0.1  # redder at the centre by more than 0.1 mag
            gradients += 1
    assert gradients >= 2


def test_satellites_carry_the_light_of_the_stellar_to_halo_mass_relation():
    # Moster, Naab & White (2013, MNRAS 428, 3121, eq. 2, Table 1; from memory): at M = M1 =
    # 10^11.59 M_sun (z = 0) the stellar-to-halo mass ratio is N = 0.0351, and far below M1 it
    # falls as (M / M1)^beta, beta = 1.376.
    from simlens.imaging.scene import build_scene
    from simlens.populations.scaling_relations import StellarToHaloMass
    from simlens.truth.sampler import PopulationSampler

    from .conftest import PHYSICAL_RECIPE

    relation = StellarToHaloMass()
    assert relation.stellar_mass(10**11.59, 0.0) / 10**11.59 == pytest.approx(0.0351, rel=1e-9)
    low = relation.stellar_mass(1e9, 0.0) / relation.stellar_mass(1e8, 0.0)
    assert np.log10(low) == pytest.approx(1 + 1.376, abs=0.01)

    text = PHYSICAL_RECIPE + ("\n[lens.subhalos]\ncount = 3\nmass_min = 1e10\nmass_max = 1e11\nlight = true\n")
    sampler = PopulationSampler(parse_recipe(text))
    for system in sampler.draw_many(range(3)):
        assert len(system.subhalos) == 3
        scene = build_scene(system)
        for band in ("g", "r"):
            satellites = sum(system.band(band).counts_from_magnitude(h.magnitudes[band]) for h in system.subhalos)
            lens = system.band(band).counts_from_magnitude(system.lens_magnitudes[band])
            assert scene.lens_light[band].flux == pytest.approx(lens + satellites, rel=1e-9)
        for h in system.subhalos:
            assert h.stellar_mass == pytest.approx(relation.stellar_mass(h.mass, system.z_lens), rel=1e-12)
            # the satellites take the lens's template: the same colour as the lens galaxy
            assert h.magnitudes["g"] - h.magnitudes["r"] == pytest.approx(
                system.lens_magnitudes["g"] - system.lens_magnitudes["r"], abs=1e-9)
    with pytest.raises(RecipeError, match="lens.subhalos.light"):
        parse_recipe(recipe_text("\n[lens.subhalos]\ncount = 1\nlight = true\n"))
