"""Injecting lensed sources into a user's survey image, behind real galaxies.

``inject(image, recipe, lenses)`` reads a single-band FITS image and its WCS, takes the deflectors
from a catalogue (sky position, lens redshift, velocity dispersion; optional mass axis ratio and
angle) or, with ``lenses="auto"``, selects them in the image (:func:`select_lens_galaxies`), draws a source for each from the recipe's source population and placement, ray-traces it
through an SIE at the galaxy's position (the sub-pixel offset included), convolves it with the PSF
and adds it -- only the lensed source: the lens light is the real galaxy -- with Poisson noise for
the added electrons.  The input file is never modified.

PSF: a user PSF image (``psf``; normalised here, assumed sampled at the image's pixels and centred
on its central pixel); ``psf="stars"`` for an empirical PSF built from the image's own stars
(:func:`empirical_psf`, written to ``psf.fits``); else the recipe band's PSF drawn by GalSim at the
image's pixel scale.
Photometry: ``GAIN`` (electrons per image unit) and ``MAGZERO`` (AB magnitude of one image unit)
from the header, or given explicitly; a missing one is an error that names it.

Outputs, as ``make`` writes them: ``cutouts/lens_NNNNN.fits`` (INJECTED, ADDED and PSF with the
image's WCS), ``truth.fits``/``truth.ecsv`` (one row per lens, with pixel and sky positions), and
with ``full_image`` the whole injected image and the added-flux image.
"""

from __future__ import annotations

import dataclasses
import json
import math
import warnings
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from astropy.io import fits
from astropy.table import Table
from astropy.wcs import WCS
from astropy.wcs.utils import proj_plane_pixel_scales
from scipy.signal import fftconvolve

from .errors import SimlensError, SimlensWarning, clip
from .user_tables import number_column, read_user_table
from .output.atomic import atomic_path
from .output.ownership import confined
from .imaging.rays import ComponentImages, PixelGrid
from .imaging.render import observation_rays
from .truth.psf import psf_fwhm_range
from .imaging.scene import build_scene
from .cosmology import DistanceTable
from .truth.sampler import PopulationSampler
from .truth.streams import injection_streams
from .recipe import Recipe
from .recipe.distributions import Fixed, Grid

__all__ = ["SurveyImage", "read_survey_image", "read_lens_catalogue", "inject", "InjectionResult", "empirical_psf",
           "select_lens_galaxies"]

ARCSEC_PER_DEGREE = 3600.0


@dataclass(frozen=True, eq=False)
class SurveyImage:
    path: Path
    data: np.ndarray
    header: fits.Header
    wcs: WCS
    pixel_scale: float  # arcsec
    gain: float  # electrons per image unit
    zero_point: float  # AB magnitude of one image unit


def read_survey_image(path: str | Path, gain: float | None = None, zero_point: float | None = None) -> SurveyImage:
    """The first image HDU of ``path`` with its celestial WCS, pixel scale, gain and zero point."""
    path = Path(path)
    if not path.is_file():
        raise SimlensError(f"{path}: no such image")
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # astropy's warning on a truncated file precedes its error
            hdul = fits.open(path)
        with hdul:
            hdu = next((h for h in hdul if h.data is not None and getattr(h.data, "ndim", 0) == 2), None)
            if hdu is None:
                raise SimlensError(f"{path}: no two-dimensional image HDU")
            data, header = np.array(hdu.data, dtype=float), hdu.header.copy()
    except (OSError, ValueError, TypeError) as exc:  # astropy's reports of a file that is not FITS
        raise SimlensError(f"{path}: not a readable FITS image ({type(exc).__name__}); "
                           "give a FITS file holding the survey image") from None
    if not np.isfinite(data).any():
        raise SimlensError(f"{path}: the image holds no finite pixel (all NaN or infinite); give an image with data")
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # astropy's notes on non-standard keywords
            wcs = WCS(header)
    except Exception as exc:  # astropy raises several kinds for a malformed WCS
        raise SimlensError(f"{path}: the image's WCS cannot be read ({type(exc).__name__}: {clip(exc)})") from None
    if not wcs.has_celestial:
        raise SimlensError(f"{path}: the image has no celestial WCS (CTYPE/CRVAL/CRPIX/CD keywords); "
                           "injection needs sky positions")
    scales = proj_plane_pixel_scales(wcs.celestial) * ARCSEC_PER_DEGREE
    if abs(scales[0] - scales[1]) > 1e-3 * scales.mean():
        raise SimlensError(f"{path}: pixels are not square ({scales[0]:.4g} x {scales[1]:.4g} arcsec)")
    values = {}
    for key, given, option in (("GAIN", gain, "--gain"), ("MAGZERO", zero_point, "--zero-point")):
        if given is not None:
            values[key] = float(given)
        elif key in header:
            try:
                values[key] = float(header[key])
            except (TypeError, ValueError):
                raise SimlensError(f"{path}: header {key} is not a number ({clip(repr(header[key]))}); "
                                   f"give it with {option}") from None
        else:
            raise SimlensError(f"{path}: header has no {key}; give it with {option}")
        if not math.isfinite(values[key]):
            raise SimlensError(f"{path}: {key} must be finite, got {values[key]}; give it with {option}")
    if not values["GAIN"] > 0:
        raise SimlensError(f"{path}: gain must be > 0, got {values['GAIN']}")
    return SurveyImage(path=path, data=data, header=header, wcs=wcs, pixel_scale=float(scales.mean()),
                       gain=values["GAIN"], zero_point=values["MAGZERO"])


def read_lens_catalogue(path: str | Path) -> Table:
    """Deflectors: ``ra``, ``dec`` (deg), ``z_lens``, ``velocity_dispersion`` (km/s); optional
    ``mass_q``, ``mass_angle`` (deg CCW from +x).  CSV, ECSV or FITS."""
    table = read_user_table(path, "lens catalogue", ("ra", "dec", "z_lens", "velocity_dispersion"))
    for column, low, high, unit in _CATALOGUE_RANGES:
        if column not in table.colnames:
            continue
        values = number_column(path, table, column, finite=False)
        bad = ~(np.isfinite(values) & (values >= low) & (values <= high)) | (values == 0) & (low == 0)
        if bad.any():
            row = int(np.flatnonzero(bad)[0])
            raise SimlensError(f"{path}: row {row + 1} (lens {row}): {column} = {values[row]:g} is not in "
                               f"{'(' if low == 0 else '['}{low:g}, {high:g}]{unit}; fix or remove the row")
    return table


# Accepted catalogue values: (column, low, high, unit); a low of 0 is open (a positive value).
_CATALOGUE_RANGES = (("ra", -360.0, 360.0, " deg"), ("dec", -90.0, 90.0, " deg"), ("z_lens", 0.0, 10.0, ""),
                     ("velocity_dispersion", 0.0, 2000.0, " km/s"), ("mass_q", 0.0, 1.0, ""),
                     ("mass_angle", -360.0, 360.0, " deg"))


def _check_on_image(path, lenses: Table, positions: list, shape: tuple) -> None:
    """Every lens of a catalogue lies on the image (its centre inside the pixel grid)."""
    ny, nx = shape
    for index, (px, py) in enumerate(positions):
        if not (-0.5 <= px < nx - 0.5 and -0.5 <= py < ny - 0.5):
            raise SimlensError(f"{path}: row {index + 1} (lens {index}) at ra {float(lenses['ra'][index]):.5f}, "
                               f"dec {float(lenses['dec'][index]):.5f} falls outside the image (pixel "
                               f"{px:.0f}, {py:.0f} of {nx} x {ny}); remove it from the catalogue")


def select_lens_galaxies(image: SurveyImage, recipe: Recipe, band: str, psf_fwhm_arcsec: float,
                         max_lenses: int = 100, snr_min: float = 50.0, gini_min: float = 0.55) -> Table:
    """Lens galaxies found in the image itself (photutils segmentation and source catalogue).

    The rule (simple and documented, not a trained classifier): sources detected at 3 sigma over
    10 connected pixels; bright (segment S/N > ``snr_min``); extended (light-moment semimajor axis
    above one PSF FWHM, which rejects stars); concentrated like early types (Gini coefficient above
    ``gini_min``; Abraham et al. 2003, Lotz et al. 2004 use Gini to separate early types -- the cut is
    common practice, from memory); the ``max_lenses`` brightest.  The mass follows the light's
    moments: axis ratio 1/elongation, angle = the orientation (CCW from +x).  Redshifts are drawn
    from the recipe's lens population; velocity dispersions follow from the Faber-Jackson relation
    of ``[lens.light.scaling]`` (its defaults otherwise) with the galaxy's magnitude, the distance
    modulus and the early-type K-correction through the band's filter (none without a filter)."""
    from astropy.stats import sigma_clipped_stats
    from photutils.segmentation import SourceCatalog, detect_sources

    from .populations.photometry import kcorrection
    from .populations.scaling_relations import FaberJackson

    _, median, std = sigma_clipped_stats(image.data)
    data = image.data - median
    segments = detect_sources(data, 3.0 * std, n_pixels=10)
    if segments is None:
        raise SimlensError(f"{image.path}: no sources detected for automatic lens selection")
    catalogue = SourceCatalog(data, segments)
    fwhm_px = psf_fwhm_arcsec / image.pixel_scale
    chosen = []
    for source in catalogue:
        flux = float(source.segment_flux)
        snr = flux / (std * math.sqrt(float(source.area.value)))
        if not (flux > 0 and snr > snr_min and float(source.semimajor_axis.value) > fwhm_px
                and float(source.gini) > gini_min):
            continue
        chosen.append((flux, source))
    chosen = [s for _, s in sorted(chosen, key=lambda fs: -fs[0])][:max_lenses]
    if not chosen:
        raise SimlensError(f"{image.path}: no galaxy passes the automatic lens selection; give --lenses CATALOG")
    scaling = recipe.lens.light.scaling
    fj = (FaberJackson(scaling.faber_jackson_slope, scaling.faber_jackson_magnitude, scaling.faber_jackson_sigma, 0.0)
          if scaling is not None else FaberJackson(scatter=0.0))
    filt = recipe.survey.band(band).filter
    rest = scaling.rest_filter if scaling is not None else "LSST_r"
    k_table = kcorrection("elliptical", filt, rest) if filt is not None else None
    distances = DistanceTable(recipe.cosmology.build())
    redshifts = _lens_redshifts(recipe, distances, len(chosen))
    rows = []
    for index, source in enumerate(chosen):
        x, y = float(source.x_centroid), float(source.y_centroid)
        ra, dec = (float(v) for v in image.wcs.celestial.pixel_to_world_values(x, y))
        z = float(redshifts[index])
        magnitude = image.zero_point - 2.5 * math.log10(float(source.segment_flux))
        absolute = magnitude - float(distances.distmod(z)) - (k_table(z) if k_table else 0.0)
        sigma = fj.reference_sigma * 10 ** (-(absolute - fj.magnitude_at_reference) / (2.5 * fj.slope))
        rows.append({"ra": ra, "dec": dec, "x_pixel": x, "y_pixel": y, "z_lens": z,
                     "velocity_dispersion": float(np.clip(sigma, 50.0, 500.0)),
                     "mass_q": float(np.clip(1.0 / float(source.elongation), 0.2, 1.0)),
                     "mass_angle": float(source.orientation.value), f"mag_{band}": magnitude,
                     "gini": float(source.gini), "snr": float(source.segment_flux) / (std * math.sqrt(float(source.area.value)))})
    return Table(rows=rows)


def _lens_redshifts(recipe: Recipe, distances: DistanceTable, n: int) -> np.ndarray:
    """Redshifts of ``n`` automatically selected lens galaxies, from the recipe's lens population
    (its redshift distribution, without the lensing weight) or its ``lens.redshift``, drawn from
    the injection's own stream (never a system's, whose draws they would correlate with)."""
    u = injection_streams(recipe.seed)["lens_redshifts"].uniform(size=n)
    pop = recipe.lens.population
    if pop is not None:
        from .populations.velocity_function import VELOCITY_FUNCTIONS, DeflectorPopulation

        deflectors = DeflectorPopulation(VELOCITY_FUNCTIONS[pop.velocity_function], distances, pop.redshift_range,
                                         pop.velocity_dispersion_range, pop.density_evolution, pop.sigma_evolution)
        return deflectors.draw_redshift(u)
    redshift = recipe.lens.redshift
    if isinstance(redshift, Grid):
        return np.array([redshift.values[i % len(redshift.values)] for i in range(n)], dtype=float)
    return np.asarray(redshift.from_uniform(u), dtype=float)


@dataclass
class InjectionResult:
    truth: Table
    files: list


def empirical_psf(data: np.ndarray, fwhm_pixels: float, size: int = 25, exclude=(), max_stars: int = 200,
                  exclusion_radius: float = 10.0) -> tuple[np.ndarray, int]:
    """An effective PSF from the image's own stars (photutils): ``(normalised kernel, stars used)``.

    Star selection (a simple documented rule): DAOStarFinder peaks above 10 sigma of the
    sigma-clipped background with its default sharpness (0.2-1) and roundness (|r| < 1) limits, which
    drop most extended galaxies; then only sources with no other detection within ``size`` pixels,
    whole ``size`` x ``size`` stamps inside the image, farther than ``exclusion_radius`` pixels from
    every position in ``exclude`` (the lens galaxies), the ``max_stars`` brightest.  The stamps
    are combined by photutils' EPSFBuilder at the image's sampling (oversampling 1)."""
    from astropy.nddata import NDData
    from astropy.stats import sigma_clipped_stats
    from photutils.detection import DAOStarFinder
    from photutils.psf import EPSFBuilder, extract_stars

    _, median, std = sigma_clipped_stats(data)
    found = DAOStarFinder(fwhm=fwhm_pixels, threshold=10.0 * std)(data - median)
    if found is None or len(found) == 0:
        raise SimlensError("no stars found for an empirical PSF; give a PSF image with --psf")
    x = np.asarray(found["x_centroid"] if "x_centroid" in found.colnames else found["xcentroid"], float)
    y = np.asarray(found["y_centroid"] if "y_centroid" in found.colnames else found["ycentroid"], float)
    flux = np.asarray(found["flux"], float)
    half = size // 2
    ny, nx = data.shape
    keep = (x > half + 1) & (x < nx - half - 2) & (y > half + 1) & (y < ny - half - 2)
    separation = np.hypot(x[:, None] - x[None, :], y[:, None] - y[None, :])
    np.fill_diagonal(separation, np.inf)
    keep &= separation.min(axis=1) > size
    for ex, ey in exclude:
        keep &= np.hypot(x - ex, y - ey) > exclusion_radius
    chosen = np.flatnonzero(keep)
    chosen = chosen[np.argsort(-flux[chosen])][:max_stars]
    if chosen.size < 5:
        raise SimlensError(f"only {chosen.size} isolated stars found for an empirical PSF (5 needed); "
                           "give a PSF image with --psf")
    stars = extract_stars(NDData(data - median), Table({"x": x[chosen], "y": y[chosen]}), size=size)
    epsf, _ = EPSFBuilder(oversampling=1, maxiters=10, progress_bar=False)(stars)
    kernel = np.clip(np.asarray(epsf.data, float), 0.0, None)
    return kernel / kernel.sum(), int(chosen.size)


def _recipe_fwhm(recipe: Recipe, band: str) -> float:
    """A typical PSF FWHM of the recipe's band (arcsec): the middle of its range."""
    low, high = psf_fwhm_range(recipe, band)
    return 0.5 * (low + high)


def _psf_kernel(psf_path: str | Path | None, recipe: Recipe, band: str, pixel_scale: float,
                image: "SurveyImage | None" = None, exclude=()) -> np.ndarray:
    if psf_path == "stars":
        kernel, _ = empirical_psf(image.data, _recipe_fwhm(recipe, band) / pixel_scale, exclude=exclude)
        return kernel
    if psf_path is not None:
        kernel = np.array(fits.getdata(psf_path), dtype=float)
        if kernel.ndim != 2 or kernel.shape[0] % 2 == 0 or kernel.shape[1] % 2 == 0:
            raise SimlensError(f"{psf_path}: the PSF must be a 2D image with odd sides, got {kernel.shape}")
    else:
        import galsim

        settings = recipe.survey.band(band).psf
        fwhm = _recipe_fwhm(recipe, band)
        profile = (galsim.Moffat(beta=float(settings.beta.support[0]), fwhm=fwhm) if settings.profile == "moffat"
                   else galsim.Kolmogorov(fwhm=fwhm))
        n = 2 * int(math.ceil(2.5 * fwhm / pixel_scale)) + 1
        kernel = profile.drawImage(nx=n, ny=n, scale=pixel_scale).array
    total = kernel.sum()
    if not total > 0:
        raise SimlensError("the PSF image has no positive flux")
    return kernel / total


def _fine_kernel(kernel: np.ndarray, sampling: int) -> np.ndarray:
    """The effective PSF (fraction of a point source's flux per pixel, as a function of the offset)
    interpolated (cubic) at offsets of ``1 / sampling`` pixel, centred like the kernel: for
    ``n * sampling`` even the offsets are half-integer multiples of the step, as the offsets
    between a pixel centre and the samples of an even ``sampling`` are."""
    from scipy.ndimage import map_coordinates

    n = kernel.shape[0]
    c = (n - 1) / 2.0
    m = n * sampling
    offsets = (np.arange(m) - (m - 1) / 2.0) / sampling  # in pixels
    gy, gx = np.meshgrid(offsets + c, offsets + c, indexing="ij")
    fine = map_coordinates(kernel, [gy, gx], order=3, mode="constant", cval=0.0)
    return np.clip(fine, 0.0, None)


def _lensed_source_pixels(scene, band: str, counts: float, grid: PixelGrid, kernel: np.ndarray,
                          adaptive: bool) -> np.ndarray:
    """The lensed source of ``scene`` in ``band`` with ``counts`` in all (unlensed), through the
    effective PSF ``kernel`` (image pixels, odd sides), on the cutout of ``grid``: the rays and
    the source's samples are the renderer's (:func:`~simlens.imaging.render.observation_rays`,
    :class:`~simlens.imaging.rays.ComponentImages`, adaptive refinement included).

    The kernel already holds the pixel response, so each sample's counts are spread by the
    kernel read at the offset from the sample to each pixel centre (no second pixel average)."""
    source = scene.source_light[band]
    source = source.with_flux(counts) if source.flux > 0 else source
    rays, sampling = observation_rays(scene.deflector, grid)
    components = ComponentImages(rays, sampling=sampling, adaptive=adaptive)
    components.prepare_lensed(source)
    samples = components.render(source, lensed=True)
    fine_kernel = _fine_kernel(kernel, sampling)
    # Sample j of a pixel row lies (s p - j + (s + m - 2) / 2) / s pixels from pixel p's centre, with
    # s the sampling and m the fine kernel's side: that is kernel element s p - j + (s + m - 2) / 2.
    first = (sampling + fine_kernel.shape[0] - 2) // 2
    convolved = fftconvolve(samples, fine_kernel, mode="full")
    n = grid.padded_size
    pixels = convolved[first::sampling, first::sampling][:n, :n]
    return np.clip(grid.crop(pixels), 0.0, None)


# Catalogue column -> the recipe key path whose drawn value it replaces.
LENS_COLUMNS = {"z_lens": "lens.redshift", "velocity_dispersion": "lens.velocity_dispersion",
                "mass_q": "lens.mass.q", "mass_angle": "lens.mass.angle"}


def injection_sampler(recipe: Recipe, lenses: Table) -> PopulationSampler:
    """One sampler for the whole injection: the recipe's sources and placement behind SIE
    deflectors whose redshift, velocity dispersion (and shape, where given) are the catalogue's;
    system ``i`` is the catalogue's row ``i``."""
    lens = dataclasses.replace(recipe.lens, population=None, redshift=Fixed(math.nan),
                               velocity_dispersion=Fixed(math.nan),
                               mass=dataclasses.replace(recipe.lens.mass, model="sie"))
    columns = {c: path for c, path in LENS_COLUMNS.items() if c in lenses.colnames}
    given = {i: {path: float(row[c]) for c, path in columns.items()} for i, row in enumerate(lenses)}
    return PopulationSampler(dataclasses.replace(recipe, lens=lens), given=given)


def inject(image_path: str | Path, recipe: Recipe, lenses_path: str | Path, *, out: str | Path,
           psf_path: str | Path | None = None, band: str | None = None, gain: float | None = None,
           zero_point: float | None = None, full_image: bool = False, overwrite: bool = False) -> InjectionResult:
    """Add a lensed source behind every deflector of ``lenses_path`` in the image (see the module doc)."""
    image = read_survey_image(image_path, gain, zero_point)
    band = band or recipe.reference_band
    if band not in recipe.survey.band_names:
        raise SimlensError(f"band {band!r} is not in the recipe ({', '.join(recipe.survey.band_names)})")
    out = Path(out)
    automatic = str(lenses_path) == "auto"
    lenses = select_lens_galaxies(image, recipe, band, _recipe_fwhm(recipe, band)) if automatic else \
        read_lens_catalogue(lenses_path)
    positions = [tuple(float(v) for v in image.wcs.celestial.world_to_pixel_values(float(r["ra"]), float(r["dec"])))
                 for r in lenses]
    if not automatic:
        _check_on_image(lenses_path, lenses, positions, image.data.shape)
    _claim_output_folder(out, overwrite)  # nothing is written before the inputs pass
    files: list = []
    if automatic:
        with atomic_path(out / "lenses_selected.ecsv") as tmp:
            lenses.write(tmp, format="ascii.ecsv")
        files.append("lenses_selected.ecsv")
    kernel = _psf_kernel(psf_path, recipe, band, image.pixel_scale, image, exclude=positions)
    if psf_path == "stars":
        with atomic_path(out / "psf.fits") as tmp:
            fits.PrimaryHDU(data=kernel.astype(np.float32)).writeto(tmp)
        files.append("psf.fits")
    size = recipe.survey.cutout_size
    padding = kernel.shape[0] // 2 + 1
    injected = image.data.copy()
    added_total = np.zeros_like(image.data)
    rng = injection_streams(recipe.seed)["noise"]
    systems = injection_sampler(recipe, lenses).draw_many(range(len(lenses)))
    rows, holes = [], []
    ny, nx = image.data.shape
    for index, (row, system) in enumerate(zip(lenses, systems)):
        px, py = (float(v) for v in image.wcs.celestial.world_to_pixel_values(float(row["ra"]), float(row["dec"])))
        # The cutout's centre (pixel (size - 1) / 2, the renderer's convention) nearest the lens,
        # and the lens's offset from it (within half a pixel), which the rays take into account.
        c0, r0 = int(round(px - 0.5 * (size - 1))), int(round(py - 0.5 * (size - 1)))
        offset = ((px - c0 - 0.5 * (size - 1)) * image.pixel_scale, (py - r0 - 0.5 * (size - 1)) * image.pixel_scale)
        grid = PixelGrid(size=size, pixel_scale=image.pixel_scale, supersampling=recipe.survey.supersampling,
                         padding=padding, lens_offset=offset)
        counts = 10 ** (-0.4 * (system.source_magnitude(band) - image.zero_point))
        stamp = _lensed_source_pixels(build_scene(system), band, counts, grid, kernel,
                                      recipe.survey.adaptive_supersampling)
        # the stamp's pixel (r, c) is image pixel (r0 + r, c0 + c)
        rs, cs = slice(max(r0, 0), min(r0 + size, ny)), slice(max(c0, 0), min(c0 + size, nx))
        sub = stamp[rs.start - r0:rs.stop - r0, cs.start - c0:cs.stop - c0]
        blank = ~np.isfinite(image.data[rs, cs])
        if blank.any():
            holes.append(f"lens {index} ({int(blank.sum())} pixels)")
        electrons = rng.poisson(sub * image.gain)
        injected[rs, cs] += electrons / image.gain
        added_total[rs, cs] += sub
        cutout_file = f"cutouts/lens_{index:05d}.fits"
        _write_cutout(out / cutout_file, injected[rs, cs], sub, kernel, image, rs, cs)
        files.append(cutout_file)
        theta_e = system.einstein_radius
        rows.append({"lens_index": index, "ra": float(row["ra"]), "dec": float(row["dec"]), "x_pixel": px,
                     "y_pixel": py, "z_lens": system.z_lens, "velocity_dispersion": system.velocity_dispersion,
                     "einstein_radius": theta_e, "z_source": system.z_source,
                     f"source_mag_{band}": system.source_magnitude(band), "source_x": system.source_x,
                     "source_y": system.source_y, "added_flux": float(sub.sum()),
                     "added_flux_unclipped": float(stamp.sum()), "blank_pixels": int(blank.sum()),
                     "file": cutout_file})
    if holes:
        warnings.warn(f"{image.path}: pixels without data (NaN or infinite) under {len(holes)} of the lenses: "
                      f"{', '.join(holes[:5])}{' ...' if len(holes) > 5 else ''}; they stay blank in the injected "
                      "image and are counted in the truth's blank_pixels", SimlensWarning, stacklevel=2)
    truth = Table(rows=rows)
    for name, unit in (("ra", "deg"), ("dec", "deg"), ("einstein_radius", "arcsec"), ("source_x", "arcsec"),
                       ("source_y", "arcsec"), ("velocity_dispersion", "km / s")):
        truth[name].unit = unit
    truth.meta.update({"image": str(image.path), "band": band, "gain": image.gain, "magzero": image.zero_point,
                       "psf": ("empirical, from the image's stars (psf.fits)" if psf_path == "stars"
                               else str(psf_path) if psf_path else f"recipe {band} PSF")})
    for name, fmt in (("truth.fits", "fits"), ("truth.ecsv", "ascii.ecsv")):
        with atomic_path(out / name) as tmp:
            truth.write(tmp, format=fmt)
        files.append(name)
    if full_image:
        for name, data in (("injected.fits", injected), ("added.fits", added_total)):
            header = image.header.copy()
            header["HISTORY"] = f"simlens inject: {len(truth)} lensed sources added ({name})"
            with atomic_path(out / name) as tmp:
                fits.PrimaryHDU(data=data.astype(np.float32), header=header).writeto(tmp)
            files.append(name)
    with atomic_path(out / INJECTION_RECORD) as tmp:
        tmp.write_text(json.dumps({"format": INJECTION_FORMAT, "files": files}, indent=1) + "\n", encoding="utf-8")
    return InjectionResult(truth=truth, files=files)


INJECTION_RECORD = "injection.json"  # the files an injection wrote: the only ones --overwrite removes
INJECTION_FORMAT = "simlens-injection/1"


def _claim_output_folder(out: Path, overwrite: bool) -> None:
    """Make ``out`` ready: an empty or new folder, or (with ``overwrite``) a folder of an earlier
    injection, whose recorded files are removed; a folder holding anything else is refused."""
    if out.exists() and not out.is_dir():
        raise SimlensError(f"{out}: exists and is not a folder; choose another --out")
    if out.exists() and any(out.iterdir()):
        record = out / INJECTION_RECORD
        if not overwrite:
            raise SimlensError(f"{out} exists and is not empty; choose another --out, or pass --overwrite "
                               f"if it holds an earlier simlens injection")
        try:
            written = json.loads(record.read_text(encoding="utf-8"))
            listed = [str(name) for name in written["files"]] if written.get("format") == INJECTION_FORMAT else None
        except (OSError, ValueError, TypeError, KeyError, AttributeError):
            listed = None
        if listed is None:
            raise SimlensError(f"{out}: holds no simlens injection ({INJECTION_RECORD} missing or unreadable); "
                               f"simlens replaces only its own output: choose another --out")
        ours = {confined(out, name, record).relative_to(out) for name in listed} | {Path(INJECTION_RECORD)}
        foreign = sorted(str(p.relative_to(out)) for p in out.rglob("*")
                         if not p.is_dir() and p.relative_to(out) not in ours)
        if foreign:
            raise SimlensError(f"{out}: holds files simlens did not write there ({', '.join(foreign[:3])}"
                               f"{' ...' if len(foreign) > 3 else ''}); nothing was removed: move them away "
                               f"or choose another --out")
        for name in ours:
            (out / name).unlink(missing_ok=True)
    (out / "cutouts").mkdir(parents=True, exist_ok=True)


def _write_cutout(path: Path, injected: np.ndarray, added: np.ndarray, kernel: np.ndarray, image: SurveyImage,
                  rows: slice, cols: slice) -> None:
    header = image.wcs.celestial[rows, cols].to_header()
    hdus = [fits.PrimaryHDU()]
    for name, data in (("INJECTED", injected), ("ADDED", added)):
        hdu = fits.ImageHDU(data=np.asarray(data, np.float32), header=header, name=name)
        hdu.header["GAIN"] = (image.gain, "electrons per image unit")
        hdu.header["MAGZERO"] = (image.zero_point, "AB magnitude of one image unit")
        hdus.append(hdu)
    hdus.append(fits.ImageHDU(data=kernel.astype(np.float32), name="PSF"))
    with atomic_path(path) as tmp:
        fits.HDUList(hdus).writeto(tmp)
