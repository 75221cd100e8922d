"""Injecting lensed sources into a user's survey images, behind real galaxies.

``inject(images, recipe, lenses)`` reads one or several bands of the same sky (a FITS file per
band, or one multi-extension file holding them all), each with its WCS and, where present, a
variance or weight plane and a mask plane; takes the deflectors from a catalogue (sky position,
lens redshift, velocity dispersion; optional mass axis ratio and angle) or, with
``lenses="auto"``, selects them in the image (:func:`select_lens_galaxies`); draws one source for
each from the recipe's source population and placement, so that its colours are the recipe's
(templates or colours) in every band; ray-traces it through an SIE at the galaxy's position (the
sub-pixel offset included) on each band's pixels, convolves it with that band's PSF and adds it --
only the lensed source: the lens light is the real galaxy -- with Poisson noise for the added
electrons.  The input files are never modified.

Layout of the inputs (EXTNAME, case-insensitive).  A file per band: the science image is the HDU
named SCI, SCIENCE or IMAGE, else the first image HDU that is not a plane below; its variance
plane VARIANCE or VAR (image units squared), or a weight plane WEIGHT, WHT, IVAR or INVVAR (inverse
variance, common practice); its mask MASK or BPM (non-zero = masked).  One file holding several
bands: the band's science HDU is named after the band (``g`` or ``SCI_g``), its planes
``VARIANCE_g`` (or ``VAR_g``), ``WEIGHT_g`` ..., ``MASK_g``.

Where the input has a variance plane the output's grows by the added counts over the gain (the
added electrons' Poisson variance, in image units squared); a weight plane becomes
``1 / (1 / w + added / gain)`` (zero weight stays zero).  Masked pixels get nothing added and keep
their mask; the truth counts them and the light that fell on them.  Pixels without data (NaN)
stay blank and are counted too.

PSF per band: a user PSF image (normalised here, assumed sampled at the image's pixels and centred
on its central pixel); ``"stars"`` for an empirical PSF built from the image's own stars
(:func:`empirical_psf`, written to ``psf_<band>.fits``); else the recipe band's PSF drawn by GalSim
at the image's pixel scale.  Photometry: ``GAIN`` (electrons per image unit) and ``MAGZERO`` (AB
magnitude of one image unit) from the science header (or the primary header), or given; a missing
one is an error that names it.

Outputs, as ``make`` writes them: ``cutouts/lens_NNNNN.fits`` (per band ``<b>_INJECTED``,
``<b>_ADDED``, the updated ``<b>_VARIANCE`` or ``<b>_WEIGHT``, ``<b>_MASK`` where the input has
them, and ``<b>_PSF``, with the band's WCS), ``truth.fits``/``truth.ecsv`` (one row per lens, per
band magnitudes and added fluxes), and with ``full_image`` each band's whole injected image (its
planes updated beside it) and added-flux image.
"""

from __future__ import annotations

import dataclasses
import math
import warnings
from collections.abc import Mapping
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
from .output.ownership import claim_folder, write_record
from .imaging.rays import ComponentImages, PixelGrid
from .imaging.render import observation_rays
from .truth.psf import psf_fwhm_range
from .imaging.scene import build_scene
from .cosmology import DistanceTable
from .truth.sampler import PopulationSampler
from .truth.streams import injection_streams
from .recipe import Recipe
from .recipe.distributions import Fixed, Grid

__all__ = ["SurveyImage", "read_survey_image", "read_survey_images", "read_lens_catalogue", "inject",
           "InjectionResult", "empirical_psf", "select_lens_galaxies"]

ARCSEC_PER_DEGREE = 3600.0

# EXTNAMEs of the planes beside a science image (a file per band; with "_<band>" in a multi-band file).
SCIENCE_NAMES = ("SCI", "SCIENCE", "IMAGE")
VARIANCE_NAMES = ("VARIANCE", "VAR")
WEIGHT_NAMES = ("WEIGHT", "WHT", "IVAR", "INVVAR")
MASK_NAMES = ("MASK", "BPM")


@dataclass(frozen=True, eq=False)
class SurveyImage:
    """One band of the user's survey data: the science pixels and the planes beside them."""
    path: Path
    band: str
    data: np.ndarray
    header: fits.Header
    wcs: WCS
    pixel_scale: float  # arcsec
    gain: float  # electrons per image unit
    zero_point: float  # AB magnitude of one image unit
    variance: np.ndarray | None = None  # image units squared
    weight: np.ndarray | None = None  # inverse variance
    mask: np.ndarray | None = None  # the input's mask values (non-zero = masked)

    def masked(self, region) -> np.ndarray:
        """Boolean over ``region`` (a pair of slices): the pixels the mask marks (none without a mask)."""
        if self.mask is None:
            return np.zeros(self.data[region].shape, bool)
        return self.mask[region] != 0

    def updated_noise_plane(self, added: np.ndarray, region) -> tuple[str, np.ndarray] | None:
        """``(kind, plane)`` over ``region`` with the Poisson variance of ``added`` (noiseless image
        units, zero where nothing was added) included; None without a variance or weight plane."""
        extra = added / self.gain  # variance of added / gain electrons, in image units squared
        if self.variance is not None:
            return "VARIANCE", self.variance[region] + extra
        if self.weight is not None:
            w = self.weight[region]
            with np.errstate(divide="ignore", invalid="ignore"):
                updated = np.where(w > 0, w / (1.0 + w * extra), w)
            return "WEIGHT", updated
        return None


def _find_hdu(hdul, names) -> "fits.ImageHDU | None":
    wanted = {n.upper() for n in names}
    return next((h for h in hdul if h.name.upper() in wanted and h.data is not None), None)


def _plane(path, hdul, names, shape, what) -> np.ndarray | None:
    hdu = _find_hdu(hdul, names)
    if hdu is None:
        return None
    data = np.asarray(hdu.data)
    if data.shape != shape:
        raise SimlensError(f"{path}: the {what} plane {hdu.name} is {data.shape[1]} x {data.shape[0]} pixels, the "
                           f"science image {shape[1]} x {shape[0]}; give planes of the image's shape")
    return data.astype(float) if what != "mask" else data.copy()


def read_survey_image(path: str | Path, gain: float | None = None, zero_point: float | None = None,
                      band: str | None = None, multi_band: bool = False) -> SurveyImage:
    """One band of ``path``: its science image with the celestial WCS, pixel scale, gain, zero
    point and the planes beside it (see the module doc for their names).  With ``multi_band`` the
    file holds several bands and ``band`` names the HDUs to read."""
    path = Path(path)
    if not path.is_file():
        raise SimlensError(f"{path}: no such image")
    suffix = f"_{band}" if multi_band else ""
    science_names = (band, f"SCI_{band}") if multi_band else SCIENCE_NAMES
    planes = {what: tuple(n + suffix for n in names) for what, names in
              (("variance", VARIANCE_NAMES), ("weight", WEIGHT_NAMES), ("mask", MASK_NAMES))}
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # astropy's warning on a truncated file precedes its error
            hdul = fits.open(path)
        with hdul:
            hdu = _find_hdu(hdul, science_names)
            if hdu is None and multi_band:
                raise SimlensError(f"{path}: no HDU named {band!r} or 'SCI_{band}' for band {band}; name each "
                                   f"band's image after the band, or give a file per band")
            if hdu is None:
                others = {n.upper() for names in planes.values() for n in names}
                hdu = next((h for h in hdul if h.data is not None and getattr(h.data, "ndim", 0) == 2
                            and h.name.upper() not in others), None)
            if hdu is None:
                raise SimlensError(f"{path}: no two-dimensional image HDU")
            data, header = np.array(hdu.data, dtype=float), hdu.header.copy()
            primary = hdul[0].header.copy()
            variance, weight, mask = (_plane(path, hdul, planes[what], data.shape, what)
                                      for what in ("variance", "weight", "mask"))
    except (OSError, ValueError, TypeError) as exc:  # astropy's reports of a file that is not FITS
        raise SimlensError(f"{path}: not a readable FITS image ({type(exc).__name__}); "
                           "give a FITS file holding the survey image") from None
    if variance is not None and weight is not None:
        raise SimlensError(f"{path}: holds both a variance and a weight plane{' for band ' + band if multi_band else ''}; "
                           "keep one of them")
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
        found = header if key in header else primary if key in primary else None
        if given is not None:
            values[key] = float(given)
        elif found is not None:
            try:
                values[key] = float(found[key])
            except (TypeError, ValueError):
                raise SimlensError(f"{path}: header {key} is not a number ({clip(repr(found[key]))}); "
                                   f"give it with {option}") from None
        else:
            raise SimlensError(f"{path}: header has no {key}{' for band ' + band if multi_band else ''}; "
                               f"give it with {option}")
        if not math.isfinite(values[key]):
            raise SimlensError(f"{path}: {key} must be finite, got {values[key]}; give it with {option}")
    if not values["GAIN"] > 0:
        raise SimlensError(f"{path}: gain must be > 0, got {values['GAIN']}")
    return SurveyImage(path=path, band=band or "", data=data, header=header, wcs=wcs,
                       pixel_scale=float(scales.mean()), gain=values["GAIN"], zero_point=values["MAGZERO"],
                       variance=variance, weight=weight, mask=mask)


def _per_band(value, bands, what):
    """``value`` as ``{band: value}``: one value for every band, or a mapping naming each band."""
    if not isinstance(value, Mapping):
        return {b: value for b in bands}
    unknown = sorted(set(value) - set(bands))
    if unknown:
        raise SimlensError(f"{what} given for band {unknown[0]!r}, which is not injected ({', '.join(bands)})")
    return {b: value.get(b) for b in bands}


def read_survey_images(images, recipe: Recipe, bands=None, gain=None, zero_point=None) -> dict[str, SurveyImage]:
    """The bands to inject, ``{band: SurveyImage}`` in the given order: ``images`` is one path (one
    band, the recipe's reference band by default; with several ``bands``, a multi-band file), a
    list of paths (one per band of ``bands``) or ``{band: path}``; ``gain`` and ``zero_point`` one
    value or ``{band: value}``."""
    if isinstance(images, Mapping):
        bands = list(images) if bands is None else list(bands)
        paths = {b: images.get(b) for b in bands}
    elif isinstance(images, (str, Path)):
        bands = [recipe.reference_band] if bands is None else list(bands)
        paths = {b: images for b in bands}
    else:
        images = list(images)
        if bands is None or len(bands) != len(images):
            raise SimlensError(f"{len(images)} images given for {len(bands or [])} bands; name the band of each "
                               "image with --bands (in the images' order)")
        bands = list(bands)
        paths = dict(zip(bands, images))
    if len(set(bands)) != len(bands):
        raise SimlensError(f"a band is named twice in {', '.join(bands)}; give each band once")
    for b in bands:
        if b not in recipe.survey.band_names:
            raise SimlensError(f"band {b!r} is not in the recipe ({', '.join(recipe.survey.band_names)})")
        if paths[b] is None:
            raise SimlensError(f"no image given for band {b}")
    gains, zero_points = _per_band(gain, bands, "gain"), _per_band(zero_point, bands, "zero point")
    sharing = {b: sum(str(paths[o]) == str(paths[b]) for o in bands) for b in bands}
    survey = {b: read_survey_image(paths[b], gains[b], zero_points[b], band=b,
                                   multi_band=sharing[b] > 1 or _holds_band(paths[b], b)) for b in bands}
    _check_orientations(survey)
    return survey


def _holds_band(path, band: str) -> bool:
    """Whether the file at ``path`` names an HDU after ``band`` (a multi-band file)."""
    try:
        with fits.open(path) as hdul:
            return _find_hdu(hdul, (band, f"SCI_{band}")) is not None
    except (OSError, ValueError, TypeError):
        return False  # read_survey_image says what is wrong with it


def _check_orientations(survey: dict[str, SurveyImage]) -> None:
    """The bands' pixel axes point the same way on the sky (one source is drawn for all of them,
    with its positions and angles on the pixel axes)."""
    bands = list(survey)
    first = survey[bands[0]]
    reference = first.wcs.celestial.pixel_scale_matrix / (first.pixel_scale / ARCSEC_PER_DEGREE)
    for b in bands[1:]:
        image = survey[b]
        matrix = image.wcs.celestial.pixel_scale_matrix / (image.pixel_scale / ARCSEC_PER_DEGREE)
        if not np.allclose(matrix, reference, atol=1e-3):
            raise SimlensError(f"{image.path}: the pixel axes of band {b} are turned or flipped against band "
                               f"{bands[0]}'s ({first.path}); resample the bands to one orientation first")


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


def _check_on_image(path, lenses: Table, positions: list, shape: tuple, image_path) -> None:
    """Every lens of a catalogue lies on the image (its centre inside the pixel grid)."""
    ny, nx = shape
    for index, (px, py) in enumerate(positions):
        if not (-0.5 <= px < nx - 0.5 and -0.5 <= py < ny - 0.5):
            raise SimlensError(f"{path}: row {index + 1} (lens {index}) at ra {float(lenses['ra'][index]):.5f}, "
                               f"dec {float(lenses['dec'][index]):.5f} falls outside the image (pixel "
                               f"{px:.0f}, {py:.0f} of {nx} x {ny} in {image_path}); remove it from the catalogue")


def select_lens_galaxies(image: SurveyImage, recipe: Recipe, band: str, psf_fwhm_arcsec: float,
                         max_lenses: int = 100, snr_min: float = 50.0, gini_min: float = 0.55) -> Table:
    """Lens galaxies found in the image itself (photutils segmentation and source catalogue).

    The rule (simple and documented, not a trained classifier): sources detected at 3 sigma over
    10 connected pixels; bright (segment S/N > ``snr_min``); extended (light-moment semimajor axis
    above one PSF FWHM, which rejects stars); concentrated like early types (Gini coefficient above
    ``gini_min``; Abraham et al. 2003, Lotz et al. 2004 use Gini to separate early types -- the cut is
    common practice, from memory); the ``max_lenses`` brightest.  The mass follows the light's
    moments: axis ratio 1/elongation, angle = the orientation (CCW from +x).  Redshifts are drawn
    from the recipe's lens population; velocity dispersions follow from the galaxy's magnitude, the distance
    modulus and the early-type K-correction through the band's filter (none without a filter) by
    the relations of ``[lens.light.scaling]`` (the mean sigma given M of Bernardi et al. 2003's
    joint law, or the Faber-Jackson relation inverted; the joint law without the table)."""
    from astropy.stats import sigma_clipped_stats
    from photutils.segmentation import SourceCatalog, detect_sources

    from .populations.photometry import kcorrection
    from .populations.scaling_relations import EarlyTypeJointDistribution, FaberJackson

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
    if scaling is None or scaling.relations == "bernardi2003":
        sigma_at = EarlyTypeJointDistribution().mean_sigma_given_magnitude
    else:
        fj = FaberJackson(scaling.faber_jackson_slope, scaling.faber_jackson_magnitude, scaling.faber_jackson_sigma, 0.0)
        sigma_at = fj.mean_sigma
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
        sigma = float(sigma_at(absolute))
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


def inject(images, recipe: Recipe, lenses_path: str | Path, *, out: str | Path, bands=None, psf=None,
           gain=None, zero_point=None, full_image: bool = False, overwrite: bool = False) -> InjectionResult:
    """Add a lensed source behind every deflector of ``lenses_path`` in each band of ``images``
    (see the module doc; ``images``, ``bands``, ``gain`` and ``zero_point`` as
    :func:`read_survey_images` takes them; ``psf`` a path, ``"stars"`` or None, or ``{band: ...}``)."""
    survey = read_survey_images(images, recipe, bands, gain, zero_point)
    bands = list(survey)
    psfs = _per_band(psf, bands, "psf")
    out = Path(out)
    automatic = str(lenses_path) == "auto"
    selection_band = recipe.reference_band if recipe.reference_band in survey else bands[0]
    if automatic:
        lenses = select_lens_galaxies(survey[selection_band], recipe, selection_band,
                                      _recipe_fwhm(recipe, selection_band))
    else:
        lenses = read_lens_catalogue(lenses_path)
    positions = {b: [tuple(float(v) for v in image.wcs.celestial.world_to_pixel_values(float(r["ra"]), float(r["dec"])))
                     for r in lenses] for b, image in survey.items()}
    if not automatic:
        for b, image in survey.items():
            _check_on_image(lenses_path, lenses, positions[b], image.data.shape, image.path)
    claim_folder(out, overwrite, INJECTION_RECORD, INJECTION_FORMAT, "injection", subfolders=("cutouts",))  # inputs passed
    files: list = []
    if automatic:
        with atomic_path(out / "lenses_selected.ecsv") as tmp:
            lenses.write(tmp, format="ascii.ecsv")
        files.append("lenses_selected.ecsv")
    kernels = {}
    for b, image in survey.items():
        kernels[b] = _psf_kernel(psfs[b], recipe, b, image.pixel_scale, image, exclude=positions[b])
        if psfs[b] == "stars":
            with atomic_path(out / f"psf_{b}.fits") as tmp:
                fits.PrimaryHDU(data=kernels[b].astype(np.float32)).writeto(tmp)
            files.append(f"psf_{b}.fits")
    injected = {b: image.data.copy() for b, image in survey.items()}
    added_total = {b: np.zeros_like(image.data) for b, image in survey.items()}
    rng = injection_streams(recipe.seed)["noise"]
    systems = injection_sampler(recipe, lenses).draw_many(range(len(lenses)))
    rows, holes = [], []
    for index, (row, system) in enumerate(zip(lenses, systems)):
        scene = build_scene(system)
        px, py = positions[bands[0]][index]
        truth_row = {"lens_index": index, "ra": float(row["ra"]), "dec": float(row["dec"]), "x_pixel": px,
                     "y_pixel": py, "z_lens": system.z_lens, "velocity_dispersion": system.velocity_dispersion,
                     "einstein_radius": system.einstein_radius, "z_source": system.z_source,
                     "source_x": system.source_x, "source_y": system.source_y}
        cutout_hdus = [fits.PrimaryHDU()]
        for b, image in survey.items():
            added = _add_lensed_source(image, scene, system.source_magnitude(b), positions[b][index], recipe,
                                       kernels[b], injected[b], added_total[b], rng)
            if added.blank:
                holes.append(f"lens {index} in {b} ({added.blank} pixels)")
            truth_row.update({f"source_mag_{b}": system.source_magnitude(b), f"added_flux_{b}": added.flux,
                              f"added_mag_{b}": (image.zero_point - 2.5 * math.log10(added.flux) if added.flux > 0
                                                 else math.nan),
                              f"added_flux_unclipped_{b}": added.flux_unclipped,
                              f"added_flux_masked_{b}": added.flux_masked, f"blank_pixels_{b}": added.blank,
                              f"masked_pixels_{b}": added.masked})
            cutout_hdus += _cutout_hdus(image, injected[b], added_total[b], added, kernels[b])
        cutout_file = f"cutouts/lens_{index:05d}.fits"
        with atomic_path(out / cutout_file) as tmp:
            fits.HDUList(cutout_hdus).writeto(tmp)
        files.append(cutout_file)
        truth_row["file"] = cutout_file
        rows.append(truth_row)
    if holes:
        warnings.warn(f"pixels without data (NaN or infinite) under {len(holes)} of the lenses: "
                      f"{', '.join(holes[:5])}{' ...' if len(holes) > 5 else ''}; they stay blank in the injected "
                      "images and are counted in the truth's blank_pixels_<band>", SimlensWarning, stacklevel=2)
    truth = Table(rows=rows)
    for name, unit in (("ra", "deg"), ("dec", "deg"), ("einstein_radius", "arcsec"), ("source_x", "arcsec"),
                       ("source_y", "arcsec"), ("velocity_dispersion", "km / s")):
        truth[name].unit = unit
    truth.meta["bands"] = ",".join(bands)
    truth.meta["pixel_positions_in"] = bands[0]
    for b, image in survey.items():  # flat keys: a FITS header holds them (HIERARCH where long)
        truth.meta.update({f"image_{b}": str(image.path), f"gain_{b}": image.gain, f"magzero_{b}": image.zero_point,
                           f"psf_{b}": ("empirical, from the image's stars" if psfs[b] == "stars"
                                       else str(psfs[b]) if psfs[b] else f"recipe {b} PSF")})
    for name, fmt in (("truth.fits", "fits"), ("truth.ecsv", "ascii.ecsv")):
        with atomic_path(out / name) as tmp, warnings.catch_warnings():
            warnings.simplefilter("ignore", fits.verify.VerifyWarning)  # "a HIERARCH card will be created"
            truth.write(tmp, format=fmt)
        files.append(name)
    if full_image:
        for b, image in survey.items():
            files += _write_full_images(out, image, injected[b], added_total[b], len(truth))
    write_record(out, INJECTION_RECORD, INJECTION_FORMAT, files)
    return InjectionResult(truth=truth, files=files)


INJECTION_RECORD = "injection.json"  # the files an injection wrote: the only ones --overwrite removes
INJECTION_FORMAT = "simlens-injection/1"



@dataclass(frozen=True)
class _AddedSource:
    """What one lens's source added to one band: the region of the image, the noiseless added
    image there (zero on masked pixels) and the figures the truth keeps."""
    region: tuple
    pixels: np.ndarray
    flux: float  # noiseless counts added (image units)
    flux_unclipped: float  # the whole stamp's, inside the image or not
    flux_masked: float  # the stamp's counts on masked pixels, not added
    blank: int  # pixels without data in the region
    masked: int  # masked pixels in the region


def _add_lensed_source(image: SurveyImage, scene, magnitude: float, position, recipe: Recipe, kernel: np.ndarray,
                       injected: np.ndarray, added_total: np.ndarray, rng) -> _AddedSource:
    """Render the lensed source of ``scene`` on the cutout of ``image`` around ``position`` (pixels)
    and add it, with Poisson noise, to ``injected`` (masked pixels excepted); ``added_total``
    collects the noiseless added image."""
    size = recipe.survey.cutout_size
    px, py = position
    # The cutout's centre (pixel (size - 1) / 2, the renderer's convention) nearest the lens,
    # and the lens's offset from it (within half a pixel), which the rays take into account.
    c0, r0 = int(round(px - 0.5 * (size - 1))), int(round(py - 0.5 * (size - 1)))
    offset = ((px - c0 - 0.5 * (size - 1)) * image.pixel_scale, (py - r0 - 0.5 * (size - 1)) * image.pixel_scale)
    grid = PixelGrid(size=size, pixel_scale=image.pixel_scale, supersampling=recipe.survey.supersampling,
                     padding=kernel.shape[0] // 2 + 1, lens_offset=offset)
    counts = 10 ** (-0.4 * (magnitude - image.zero_point))
    stamp = _lensed_source_pixels(scene, image.band, counts, grid, kernel, recipe.survey.adaptive_supersampling)
    ny, nx = image.data.shape
    # the stamp's pixel (r, c) is image pixel (r0 + r, c0 + c)
    rs, cs = slice(max(r0, 0), min(r0 + size, ny)), slice(max(c0, 0), min(c0 + size, nx))
    sub = stamp[rs.start - r0:rs.stop - r0, cs.start - c0:cs.stop - c0]
    masked = image.masked((rs, cs))
    pixels = np.where(masked, 0.0, sub)
    injected[rs, cs] += rng.poisson(pixels * image.gain) / image.gain
    added_total[rs, cs] += pixels
    return _AddedSource(region=(rs, cs), pixels=pixels, flux=float(pixels.sum()), flux_unclipped=float(stamp.sum()),
                        flux_masked=float(sub[masked].sum()), blank=int((~np.isfinite(image.data[rs, cs])).sum()),
                        masked=int(masked.sum()))


def _band_header(image: SurveyImage, region) -> fits.Header:
    header = image.wcs.celestial[region].to_header()
    header["BAND"] = (image.band, "band of the recipe")
    header["GAIN"] = (image.gain, "electrons per image unit")
    header["MAGZERO"] = (image.zero_point, "AB magnitude of one image unit")
    return header


def _cutout_hdus(image: SurveyImage, injected: np.ndarray, added_total: np.ndarray, added: _AddedSource,
                 kernel: np.ndarray) -> list:
    """One band's HDUs of a lens's cutout file: injected, added, the noise plane updated for all
    that was added there so far (as the injected pixels are), the mask, the PSF."""
    region, b = added.region, image.band
    header = _band_header(image, region)
    planes = [("INJECTED", injected[region]), ("ADDED", added.pixels)]
    noise = image.updated_noise_plane(added_total[region], region)
    if noise is not None:
        planes.append(noise)
    hdus = [fits.ImageHDU(data=np.asarray(data, np.float32), header=header, name=f"{b}_{name}")
            for name, data in planes]
    if image.mask is not None:
        hdus.append(fits.ImageHDU(data=image.mask[region], header=header, name=f"{b}_MASK"))
    hdus.append(fits.ImageHDU(data=kernel.astype(np.float32), name=f"{b}_PSF"))
    return hdus


def _write_full_images(out: Path, image: SurveyImage, injected: np.ndarray, added_total: np.ndarray,
                       n_lenses: int) -> list[str]:
    """A band's whole injected image (its header, with the updated noise plane and the mask
    beside it, as the input holds them) and its added-flux image."""
    whole = (slice(None), slice(None))
    header = image.header.copy()
    header["HISTORY"] = f"simlens inject: {n_lenses} lensed sources added in band {image.band}"
    hdus = [fits.PrimaryHDU(data=injected.astype(np.float32), header=header)]
    noise = image.updated_noise_plane(added_total, whole)
    if noise is not None:
        hdus.append(fits.ImageHDU(data=noise[1].astype(np.float32), header=_band_header(image, whole), name=noise[0]))
    if image.mask is not None:
        hdus.append(fits.ImageHDU(data=image.mask, header=_band_header(image, whole), name="MASK"))
    added_header = image.header.copy()
    added_header["HISTORY"] = f"simlens inject: the noiseless light of {n_lenses} lensed sources in band {image.band}"
    names = []
    for name, hdul in ((f"injected_{image.band}.fits", fits.HDUList(hdus)),
                       (f"added_{image.band}.fits", fits.HDUList([fits.PrimaryHDU(
                           data=added_total.astype(np.float32), header=added_header)]))):
        with atomic_path(out / name) as tmp:
            hdul.writeto(tmp)
        names.append(name)
    return names
