"""One multi-extension FITS file per system.

Layout (per band ``B``, in survey order), every image HDU with a celestial TAN WCS:

==============  =============================================================
HDU (EXTNAME)   content
==============  =============================================================
PRIMARY         no data; the system's identity and redshifts in the header
``B``           observed image: scene + PSF + pixel + noise, sky-subtracted
``B_SOURCE``    noiseless lensed source only (PSF-convolved)
``B_LENS``      noiseless lens light only (PSF-convolved)
``B_NEIGHBOURS`` noiseless unlensed neighbours (crowded cutouts: ``[neighbours]``)
``B_VAR``       expected noise variance per pixel, ADU^2 (if ``output.variance``)
``B_PSF``       effective PSF (PSF convolved with the pixel), unit sum
==============  =============================================================

Header keywords (our own plain names; standard ones where FITS has them): ``BUNIT`` (``adu``),
``EXPTIME`` [s], ``GAIN`` [e-/ADU], ``RDNOISE`` [e-], ``MAGZERO`` (AB:
``m = MAGZERO - 2.5 log10(counts)``), ``SKYLEVEL`` [ADU/pixel, subtracted], ``SKYMAG``
[mag/arcsec^2], ``PSFFWHM`` [arcsec], ``PSFTYPE``, ``PSFBETA``, ``PSFG1``, ``PSFG2``, ``BAND``,
``CONTENT``, ``NEXPOSE`` (exposures summed), ``RESAMPLE`` (their resampling kernel), ``SKYVAR``
[ADU^2, the noise variance of an empty pixel, after resampling] and ``VARFACT`` (the pixel variance
over the unresampled one: correlated coadd noise, :mod:`simlens.imaging.coadd`).

WCS: ``CRPIX = (N + 1) / 2`` (the cutout centre, where the lens is), ``CRVAL`` = the system's
RA/Dec, ``CD1_1 = -scale``, ``CD2_2 = +scale`` (deg): north up, east left, so image ``+x`` points
west.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
from astropy.io import fits
from astropy.wcs import WCS

from ..imaging.render import RenderedSystem
from .atomic import atomic_path

__all__ = ["cutout_wcs", "band_keywords", "write_cutout", "read_cutout"]


def cutout_wcs(ra: float, dec: float, pixel_scale: float, size: int) -> WCS:
    """Celestial TAN WCS of a square ``size`` x ``size`` cutout centred on (ra, dec) [deg]."""
    wcs = WCS(naxis=2)
    wcs.wcs.ctype = ["RA---TAN", "DEC--TAN"]
    wcs.wcs.cunit = ["deg", "deg"]
    wcs.wcs.crpix = [(size + 1) / 2.0, (size + 1) / 2.0]
    wcs.wcs.crval = [ra, dec]
    scale = pixel_scale / 3600.0
    wcs.wcs.cd = np.array([[-scale, 0.0], [0.0, scale]])
    wcs.wcs.radesys = "ICRS"
    return wcs


def _image_hdu(data: np.ndarray, name: str, content: str, rendered: RenderedSystem, observed) -> fits.ImageHDU:
    band = observed.band
    system = rendered.system
    header = cutout_wcs(system.ra, system.dec, band.pixel_scale, data.shape[0]).to_header()
    hdu = fits.ImageHDU(data=data.astype(np.float32), header=header, name=name)
    band_keywords(hdu.header, band, content, observed.noise_variance_factor)
    return hdu


def band_keywords(h: fits.Header, band, content: str, noise_variance_factor: float = 1.0) -> None:
    """The band's observing keywords (see the module docstring) written into header ``h``;
    ``noise_variance_factor`` is the noise's pixel variance over the unresampled one
    (``ObservedBand.noise_variance_factor``)."""
    h["BAND"] = (band.name, "band name from the recipe")
    h["CONTENT"] = (content, "what this image holds")
    h["BUNIT"] = ({"psf": "", "noise variance": "adu2"}.get(content, "adu"),
                  "unit sum" if content == "psf" else "pixel units")
    h["EXPTIME"] = (band.exposure_time, "[s] exposure time")
    h["GAIN"] = (band.gain, "[electron/adu] detector gain")
    h["RDNOISE"] = (band.read_noise, "[electron] read noise per pixel")
    h["MAGZERO"] = (band.magzero, "AB zero point: m = MAGZERO - 2.5 log10(adu)")
    h["SKYLEVEL"] = (band.sky_level, "[adu/pixel] sky level, subtracted")
    h["SKYMAG"] = (band.sky_brightness, "[mag/arcsec2] sky surface brightness (AB)")
    h["PSFTYPE"] = (band.psf_profile, "PSF profile")
    h["PSFFWHM"] = (band.psf_fwhm, "[arcsec] PSF FWHM (round, before PSFG1/PSFG2)")
    h["PSFG1"] = (band.psf_g1, "PSF reduced shear along +x")
    h["PSFG2"] = (band.psf_g2, "PSF reduced shear along the diagonal")
    if band.psf_profile == "moffat":
        h["PSFBETA"] = (band.psf_beta, "Moffat beta")
    h["PIXSCALE"] = (band.pixel_scale, "[arcsec/pixel] pixel scale")
    h["NEXPOSE"] = (band.exposures, "exposures summed (they share EXPTIME)")
    h["RESAMPLE"] = (band.resampling, "resampling kernel (none: white noise)")
    h["SKYVAR"] = (band.background_sigma**2 * noise_variance_factor, "[adu2] noise variance of an empty pixel")
    h["VARFACT"] = (noise_variance_factor, "SKYVAR over the unresampled variance")


def write_cutout(rendered: RenderedSystem, path: Path, run_name: str = "", variance: bool = True,
                 epochs=None) -> None:
    """Write one system's cutout file (atomically); ``variance``: with each band's B_VAR; with the
    run's ``epochs`` (:class:`~simlens.transients.cadence.Epochs`) each band's static reference
    B_REF and one HDU EPOCH_NNNN per epoch."""
    system = rendered.system
    primary = fits.PrimaryHDU()
    h = primary.header
    h["SYSID"] = (system.system_id, "system id within the run")
    h["RUNNAME"] = (run_name[:68], "simlens run")
    h["RA"] = (system.ra, "[deg] lens centre right ascension")
    h["DEC"] = (system.dec, "[deg] lens centre declination")
    h["ZLENS"] = (system.z_lens, "lens redshift")
    h["ZSOURCE"] = (system.z_source, "source redshift")
    h["THETAE"] = (system.einstein_radius, "[arcsec] Einstein radius")
    h["NIMAGES"] = (len(rendered.images), "images of the source centre")
    h["BANDS"] = (",".join(b.band.name for b in rendered.bands), "bands in HDU order")
    hdus = [primary]
    for observed in rendered.bands:
        name = observed.band.name
        hdus.append(_image_hdu(observed.image, name, "observed", rendered, observed))
        hdus.append(_image_hdu(observed.lensed_source, f"{name}_SOURCE", "noiseless lensed source", rendered, observed))
        hdus.append(_image_hdu(observed.lens_light, f"{name}_LENS", "noiseless lens light", rendered, observed))
        if observed.neighbours is not None:
            hdus.append(_image_hdu(observed.neighbours, f"{name}_NEIGHBOURS", "noiseless neighbours", rendered, observed))
        if variance:
            hdus.append(_image_hdu(observed.variance, f"{name}_VAR", "noise variance", rendered, observed))
        hdus.append(_image_hdu(observed.psf, f"{name}_PSF", "psf", rendered, observed))
        if rendered.epochs is not None:
            hdus.append(_image_hdu(rendered.epochs.reference[name], f"{name}_REF",
                                   "noiseless static reference", rendered, observed))
    if rendered.epochs is not None and epochs is not None:
        hdus += _epoch_hdus(rendered, epochs)
    with atomic_path(Path(path)) as tmp:
        fits.HDUList(hdus).writeto(tmp)


def _epoch_hdus(rendered: RenderedSystem, epochs) -> list:
    """One image HDU per epoch (EPOCH_0000, ...): the observed image, with its visit's keywords."""
    system = rendered.system
    out = []
    for e, (mjd, conditions) in enumerate(zip(epochs.time, epochs.conditions)):
        header = cutout_wcs(system.ra, system.dec, conditions.pixel_scale, rendered.grid.size).to_header()
        hdu = fits.ImageHDU(data=rendered.epochs.images[e], header=header, name=f"EPOCH_{e:04d}")
        band_keywords(hdu.header, conditions, "observed epoch")
        hdu.header["MJD-OBS"] = (float(mjd), "[d] time of the visit (MJD)")
        out.append(hdu)
    return out


def read_cutout(path: Path) -> dict:
    """Read a cutout file into ``{EXTNAME: (data, header)}`` (convenience for notebooks and tests)."""
    with fits.open(path) as hdul:
        return {hdu.name: (None if hdu.data is None else np.array(hdu.data), hdu.header.copy()) for hdu in hdul}
