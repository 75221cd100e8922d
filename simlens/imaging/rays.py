"""Ray shooting: the lensed, noiseless scene of one system, per band, before the PSF.

Pixel convention (documented once here, tested in tests/test_output.py): a cutout of ``N x N``
pixels of side ``s`` arcsec has its centre at 0-based pixel index ``((N - 1) / 2, (N - 1) / 2)``, i.e.
at the 1-based FITS reference pixel ``CRPIX = (N + 1) / 2``.  Pixel ``(row, col)`` is centred at
``x = (col - (N - 1) / 2) s`` and ``y = (row - (N - 1) / 2) s`` arcsec; arrays are indexed
``[row, col] = [y, x]``.  For even ``N`` the lens centre lies on a pixel corner.

The scene is computed on a *padded* grid: ``padding`` extra pixels on every side (so that the PSF
can spread light from outside the cutout into it), at the PSF stage's sampling (2 samples per pixel
side by default).  Lensed light is sampled by one ray per pixel everywhere, by ``supersampling^2``
rays per pixel where the lensed source has light, and adaptively by more where it varies within a
pixel (:class:`ComponentImages`).  The deflection is achromatic, so the rays are traced once per
system and reused for all bands.  Each ray carries ``surface_brightness(beta)`` times its share of
the pixel's area (the midpoint rule), which conserves surface brightness (lensing changes the solid
angle, not the surface brightness).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .light import LightProfile, PointSource, split_points
from ..lensing.mass import MassModel

__all__ = ["PixelGrid", "RayMap", "Scene", "ComponentImages", "trace_rays", "render_scene"]


@dataclass(frozen=True)
class PixelGrid:
    """A square cutout, its padding and supersampling.

    Parameters
    ----------
    size : pixels per side of the cutout.
    pixel_scale : arcsec per pixel.
    supersampling : rays per pixel side (>= 1).
    padding : pixels added on every side for the PSF's reach (>= 0).
    lens_offset : where the lens centre lies relative to the cutout centre (arcsec, x and y): zero
        for simulated cutouts; within half a pixel for a lens of a real image (injection).  Rays
        and sample positions are in the lens frame (the lens at the origin).
    """

    size: int
    pixel_scale: float
    supersampling: int = 4
    padding: int = 0
    lens_offset: tuple = (0.0, 0.0)

    def __post_init__(self):
        if self.size < 1 or self.supersampling < 1 or self.padding < 0 or not self.pixel_scale > 0:
            raise ValueError(f"invalid PixelGrid {self!r}")
        object.__setattr__(self, "lens_offset", tuple(float(v) for v in self.lens_offset))

    @property
    def padded_size(self) -> int:
        return self.size + 2 * self.padding

    @property
    def fine_size(self) -> int:
        return self.padded_size * self.supersampling

    @property
    def fine_scale(self) -> float:
        return self.pixel_scale / self.supersampling

    @property
    def fine_pixel_area(self) -> float:
        return self.fine_scale**2

    @property
    def half_width(self) -> float:
        """Half the side of the padded field (arcsec)."""
        return 0.5 * self.padded_size * self.pixel_scale

    def fine_axis(self) -> np.ndarray:
        """Centres of the fine pixels along one axis (arcsec, relative to the cutout centre)."""
        return self.sample_axis(self.supersampling)

    def sample_axis(self, sampling: int) -> np.ndarray:
        """Centres of the padded field's samples along one axis, ``sampling`` per pixel side
        (arcsec, relative to the cutout centre)."""
        k = np.arange(self.padded_size * sampling)
        return ((k + 0.5) / sampling - 0.5 * self.padded_size) * self.pixel_scale

    def in_lens_frame(self, axis: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """The x and y positions (arcsec, lens at the origin) of the samples of a cutout-frame axis."""
        return axis - self.lens_offset[0], axis - self.lens_offset[1]

    def pixel_axis(self) -> np.ndarray:
        """Centres of the cutout's pixels along one axis (arcsec)."""
        return (np.arange(self.size) - 0.5 * (self.size - 1)) * self.pixel_scale

    def crop(self, padded: np.ndarray) -> np.ndarray:
        """The cutout from a padded pixel image."""
        p = self.padding
        return padded[p:p + self.size, p:p + self.size] if p else padded


@dataclass(frozen=True)
class RayMap:
    """Rays through the whole padded field, ``sampling`` per pixel side, and where they land in the
    source plane (arcsec, lens frame; arrays indexed ``[row, col]``).

    These rays sample every lensed profile everywhere (the renderer traces one per pixel).  Where a
    lensed profile has light it traces the grid's full supersampling, and more where the light
    varies within a pixel (:class:`ComponentImages`), from ``mass``."""

    grid: PixelGrid
    x: np.ndarray
    y: np.ndarray
    beta_x: np.ndarray
    beta_y: np.ndarray
    sampling: int
    mass: MassModel | None = None  # kept for tracing more rays where a source has light

    @property
    def axes(self) -> tuple[np.ndarray, np.ndarray]:
        """Image-plane x and y coordinates (lens frame) of the rays along each axis."""
        return self.grid.in_lens_frame(self.grid.sample_axis(self.sampling))


def trace_rays(mass: MassModel, grid: PixelGrid, sampling: int | None = None) -> RayMap:
    """Shoot one ray through each sample centre of the padded field, ``sampling`` per pixel side
    (default: the grid's supersampling; otherwise a divisor of it): ``beta = theta - alpha(theta)``."""
    sampling = sampling or grid.supersampling
    if grid.supersampling % sampling:
        raise ValueError(f"sampling {sampling} must divide the supersampling {grid.supersampling}")
    x, y = np.meshgrid(*grid.in_lens_frame(grid.sample_axis(sampling)))
    beta_x, beta_y = mass.ray_shoot(x, y)
    return RayMap(grid=grid, x=x, y=y, beta_x=beta_x, beta_y=beta_y, sampling=sampling, mass=mass)


@dataclass(frozen=True)
class Scene:
    """One band's noiseless scene on the padded grid before the PSF, in counts per sample, with
    ``sampling`` samples per pixel side (the ray grid's supersampling, or a divisor of it when the
    rays have been block-summed for the PSF stage)."""

    band: str
    grid: PixelGrid
    lens_light: np.ndarray
    lensed_source: np.ndarray
    source_flux_unlensed: float
    sampling: int | None = None
    lensed_point_flux: float = 0.0  # flux of point-source images deposited in lensed_source

    def __post_init__(self):
        if self.sampling is None:
            object.__setattr__(self, "sampling", self.grid.supersampling)

    @property
    def lensed_source_flux(self) -> float:
        return float(self.lensed_source.sum())

    @property
    def magnification(self) -> float:
        """Extended-source magnification: lensed flux on the padded field over unlensed flux (of the
        source galaxy; point-source images are not counted)."""
        if self.source_flux_unlensed <= 0:
            return float("nan")
        return (self.lensed_source_flux - self.lensed_point_flux) / self.source_flux_unlensed


def cloud_in_cell(image: np.ndarray, fx, fy, flux) -> None:
    """Add point fluxes at fractional sample indices ``(fx, fy)`` (column, row; arrays) to ``image``
    by cloud-in-cell weights: flux-conserving, and a point at a sample's centre lands in that sample
    alone.  Weight outside the image is dropped."""
    fx, fy, flux = (np.atleast_1d(np.asarray(v, float)) for v in (fx, fy, flux))
    ix, iy = np.floor(fx).astype(int), np.floor(fy).astype(int)
    wx, wy = fx - ix, fy - iy
    for dy, weight_y in ((0, 1 - wy), (1, wy)):
        for dx, weight_x in ((0, 1 - wx), (1, wx)):
            r, c = iy + dy, ix + dx
            weight = flux * weight_x * weight_y
            inside = (r >= 0) & (r < image.shape[0]) & (c >= 0) & (c < image.shape[1]) & (weight != 0)
            np.add.at(image, (r[inside], c[inside]), weight[inside])


def deposit_points(image: np.ndarray, grid: PixelGrid, points: tuple, sampling: int | None = None) -> None:
    """Add point sources to an image of the padded field with ``sampling`` samples per pixel side
    (default: the ray grid's) by cloud-in-cell weights (:func:`cloud_in_cell`).  Points outside the
    padded field are dropped."""
    if not points:
        return
    sampling = sampling or grid.supersampling
    n = grid.padded_size * sampling
    scale = grid.pixel_scale / sampling
    ox, oy = grid.lens_offset  # points are in the lens frame
    x = np.array([p.center[0] for p in points], float)
    y = np.array([p.center[1] for p in points], float)
    cloud_in_cell(image, (x + ox) / scale + 0.5 * n - 0.5, (y + oy) / scale + 0.5 * n - 0.5, [p.flux for p in points])


# Image-plane (unlensed) components are re-integrated around their centres, where cuspy profiles
# (Sersic n ~ 4 holds ~10 % of its light inside 0.1 R_e) defeat the midpoint rule: the samples
# within CENTRE_REFINE_HALF_WIDTH samples of the centre are averaged over CENTRE_REFINE_PER_PIXEL
# sub-samples per pixel side.
CENTRE_REFINE_HALF_WIDTH = 8
CENTRE_REFINE_PER_PIXEL = 32


def refine_centre(unit: np.ndarray, profile: LightProfile, axes: tuple, scale: float, sampling: int,
                  half_width: int = CENTRE_REFINE_HALF_WIDTH, per_pixel: int = CENTRE_REFINE_PER_PIXEL) -> None:
    """Replace the samples within ``half_width`` samples of ``profile.center`` by averages over
    ``per_pixel`` sub-samples per pixel side (in place); ``axes`` hold the sample centres along the
    x and y axes of ``unit``, ``scale`` their spacing (arcsec) and ``sampling`` their number per
    pixel side."""
    x_axis, y_axis = axes
    n_x, n_y, h, m = x_axis.size, y_axis.size, half_width, -(-per_pixel // sampling)
    cx = int(round((profile.center[0] - x_axis[0]) / scale))
    cy = int(round((profile.center[1] - y_axis[0]) / scale))
    r0, r1 = max(cy - h, 0), min(cy + h + 1, n_y)
    c0, c1 = max(cx - h, 0), min(cx + h + 1, n_x)
    if r0 >= r1 or c0 >= c1:
        return
    offsets = ((np.arange(m) + 0.5) / m - 0.5) * scale
    ys = (y_axis[r0:r1, None] + offsets[None, :]).ravel()
    xs = (x_axis[c0:c1, None] + offsets[None, :]).ravel()
    gx, gy = np.meshgrid(xs, ys)
    sb = profile.surface_brightness(gx, gy).reshape(r1 - r0, m, c1 - c0, m).mean(axis=(1, 3))
    unit[r0:r1, c0:c1] = sb * scale * scale


# Adaptive supersampling of lensed components: a pixel whose own rays see the surface brightness
# change by more than ADAPTIVE_TOLERANCE of the component's brightest pixel (summed over the pixel)
# is re-traced with ADAPTIVE_FACTOR times more rays per side.  That is where a compact source or
# clump is sampled by few rays: small sources, high magnification gradients near critical curves.
# Measured against 16x16 rays everywhere in bench/bench_adaptive.py.
ADAPTIVE_FACTOR = 4
ADAPTIVE_TOLERANCE = 0.03


def _window_extrema(samples: np.ndarray, sampling: int) -> tuple[np.ndarray, np.ndarray]:
    """The least and greatest of ``samples`` (``sampling`` per pixel side) over each pixel and its
    eight neighbours: two pixel images."""
    extrema = []
    for pair in (np.minimum, np.maximum):
        per_pixel = samples
        for axis in (0, 1):  # over each pixel's samples, then one pixel each way (edges repeat)
            a = np.moveaxis(per_pixel, axis, 0)
            reduced = a[0::sampling].copy()
            for k in range(1, sampling):
                pair(reduced, a[k::sampling], out=reduced)
            wide = reduced.copy()
            pair(wide[1:], reduced[:-1], out=wide[1:])
            pair(wide[:-1], reduced[1:], out=wide[:-1])
            per_pixel = np.moveaxis(wide, 0, axis)
        extrema.append(per_pixel)
    return extrema[0], extrema[1]


@dataclass(frozen=True)
class PixelRays:
    """``per_side^2`` rays through each of some pixels of the padded field: ``rows, cols`` index
    the pixels, ``beta_x, beta_y`` (shape ``(pixels, per_side, per_side)``, ``[pixel, row, col]``)
    are where the rays land in the source plane."""

    rows: np.ndarray
    cols: np.ndarray
    per_side: int
    beta_x: np.ndarray
    beta_y: np.ndarray

    @property
    def size(self) -> int:
        return int(self.rows.size)


class ComponentImages:
    """Unit-flux images of light components on one ray map, computed once and reused.

    Shapes are achromatic (bands differ only in each component's flux), so a system's bands share
    every evaluation of a profile: the cache key is the component with its flux set to 1.  Every
    image has the ray map's sampling (the PSF stage's).  A lensed component is sampled by

    1. the ray map's rays, everywhere;
    2. the grid's full supersampling in the pixels whose source-plane footprint may reach the
       component's light (:meth:`~simlens.imaging.light.LightProfile.near_light`; the footprint
       is the spread of the rays of the pixel and its eight neighbours): elsewhere it is fainter
       than ``FAINT_SURFACE_BRIGHTNESS`` of its typical brightness and smooth on the rays' scale;
    3. with ``adaptive``, ADAPTIVE_FACTOR times more rays per side in the pixels whose
       full-supersampling rays disagree (see ADAPTIVE_TOLERANCE).

    Unlensed components are sampled at the rays' image-plane positions and refined around their
    centres (:func:`refine_centre`)."""

    def __init__(self, ray_map: RayMap, sampling: int | None = None, adaptive: bool = False):
        ss = ray_map.grid.supersampling
        sampling = sampling or ray_map.sampling
        if ss % sampling or sampling % ray_map.sampling:
            raise ValueError(f"sampling {sampling} must divide the supersampling {ss} and be a multiple of "
                             f"the ray map's {ray_map.sampling} rays per pixel side")
        if (adaptive or ray_map.sampling != ss) and ray_map.mass is None:
            raise ValueError("tracing more rays where a source has light needs a ray map that keeps its "
                             "mass model (trace_rays does)")
        self.ray_map = ray_map
        self.sampling = sampling
        self._positions = None  # image-plane sample positions at ``sampling``, for unlensed components
        self.adaptive = adaptive
        self.detailed_pixels = 0  # pixels sampled at full supersampling (for benchmarks)
        self.refined_pixels = 0  # pixels refined adaptively (for benchmarks)
        self._cache: dict = {}
        self._shared = None  # (full-supersampling rays, adaptive rays) from prepare_lensed
        self._samples: dict = {}  # unit component -> (its ray-map image, its full-supersampling samples)

    # -- rays -----------------------------------------------------------------------------------
    def _pixel_rays(self, rows: np.ndarray, cols: np.ndarray, per_side: int) -> PixelRays:
        """``per_side^2`` rays through each pixel ``(rows, cols)`` of the padded field, traced."""
        rm, grid = self.ray_map, self.ray_map.grid
        offsets = ((np.arange(per_side) + 0.5) / per_side - 0.5) * grid.pixel_scale
        ox, oy = grid.lens_offset
        cx = (cols + 0.5 - 0.5 * grid.padded_size) * grid.pixel_scale - ox
        cy = (rows + 0.5 - 0.5 * grid.padded_size) * grid.pixel_scale - oy
        gx, gy = np.broadcast_arrays(cx[:, None, None] + offsets[None, None, :],
                                     cy[:, None, None] + offsets[None, :, None])
        if rows.size == 0:
            return PixelRays(rows, cols, per_side, gx.astype(float), gy.astype(float))
        bx, by = rm.mass.ray_shoot(gx, gy)
        return PixelRays(rows, cols, per_side, bx, by)

    def _footprints(self):
        """Per pixel of the padded field: the centre and radius (arcsec) of a disc in the source plane
        holding the rays of the pixel and of its eight neighbours."""
        rm = self.ray_map
        (x0, x1), (y0, y1) = (_window_extrema(beta, rm.sampling) for beta in (rm.beta_x, rm.beta_y))
        return 0.5 * (x0 + x1), 0.5 * (y0 + y1), 0.5 * np.hypot(x1 - x0, y1 - y0)

    def _detail_rays(self, parts) -> PixelRays | None:
        """Full-supersampling rays through the pixels that may see the light of ``parts``; None when
        the ray map itself has the full supersampling."""
        ss = self.ray_map.grid.supersampling
        if self.ray_map.sampling == ss:
            return None
        cx, cy, radius = self._footprints()
        near = np.zeros(cx.shape, bool)
        for part in parts:
            near |= part.near_light(cx, cy, radius)
        rows, cols = np.nonzero(near)
        self.detailed_pixels = max(self.detailed_pixels, int(rows.size))
        return self._pixel_rays(rows, cols, ss)

    def _adaptive_rays(self, fine: np.ndarray, detail: PixelRays | None) -> PixelRays:
        """ADAPTIVE_FACTOR times more rays per side through the pixels whose full-supersampling
        samples ``fine`` (shape ``(pixels, ss, ss)``: of ``detail``'s pixels, or of every pixel)
        disagree."""
        ss = self.ray_map.grid.supersampling
        flat = fine.reshape(fine.shape[0], ss * ss)
        spread = (flat.max(axis=1) - flat.min(axis=1)) * ss * ss if flat.size else flat.sum(axis=1)
        peak = flat.sum(axis=1).max() if flat.size else 0.0
        flagged = np.nonzero(spread > ADAPTIVE_TOLERANCE * peak)[0] if peak > 0 else np.empty(0, int)
        if detail is not None:
            rows, cols = detail.rows[flagged], detail.cols[flagged]
        else:
            rows, cols = np.divmod(flagged, self.ray_map.grid.padded_size)
        return self._pixel_rays(rows, cols, ss * ADAPTIVE_FACTOR)

    # -- samples --------------------------------------------------------------------------------
    def _coarse(self, profile: LightProfile, lensed: bool) -> np.ndarray:
        """``profile`` at this image's sampling: lensed, from the ray map's rays (each ray's counts
        shared evenly among the samples of its patch); unlensed, at the samples' own positions."""
        rm, s = self.ray_map, self.sampling
        scale = rm.grid.pixel_scale / s
        if lensed:
            f = s // rm.sampling
            image = profile.surface_brightness(rm.beta_x, rm.beta_y) * scale * scale
            return np.repeat(np.repeat(image, f, axis=0), f, axis=1) if f > 1 else image
        if self._positions is None:
            axes = rm.grid.in_lens_frame(rm.grid.sample_axis(s))
            self._positions = axes, np.meshgrid(*(a.astype(np.float32) for a in axes))  # smooth light: single precision
        axes, (x, y) = self._positions
        image = profile.surface_brightness(x, y) * scale * scale
        if hasattr(profile, "center"):
            refine_centre(image, profile, axes, scale, s)
        return image

    @staticmethod
    def _values(profile: LightProfile, rays: PixelRays) -> np.ndarray:
        """Counts per ray of ``profile`` on ``rays`` (shape ``(pixels, per_side, per_side)``)."""
        return profile.surface_brightness(rays.beta_x, rays.beta_y) * (1.0 / rays.per_side) ** 2

    def _all_pixels(self, image: np.ndarray) -> np.ndarray:
        """An image at the full supersampling as ``(pixels, ss, ss)`` blocks, pixels in row order."""
        n, s = self.ray_map.grid.padded_size, self.sampling
        return image.reshape(n, s, n, s).transpose(0, 2, 1, 3).reshape(n * n, s, s)

    def _replace(self, image: np.ndarray, rays: PixelRays, values: np.ndarray) -> None:
        """Set the pixels of ``rays`` in ``image`` to ``values`` summed down to the image's sampling."""
        if not rays.size:
            return
        n, s = self.ray_map.grid.padded_size, self.sampling
        k = rays.per_side // s
        blocks = values.reshape(-1, s, k, s, k).sum(axis=(2, 4)) * self.ray_map.grid.pixel_scale ** 2
        image.reshape(n, s, n, s)[rays.rows, :, rays.cols, :] = blocks

    def prepare_lensed(self, source: LightProfile) -> None:
        """Choose the pixels sampled at full supersampling, and those refined adaptively, once from the
        whole lensed ``source`` (all its components), and trace their rays once; every lensed
        component is then sampled on those pixels.  Call before rendering a system's bands
        (``render_system`` does); without it each component chooses its own pixels."""
        parts = [p for p in (source.components if hasattr(source, "components") else (source,))
                 if p.flux > 0 and not isinstance(p, PointSource)]
        units = [p.with_flux(1.0) for p in parts]
        detail = self._detail_rays(units) if units else None
        adaptive = None
        if self.adaptive and units:
            for unit in units:  # kept for _unit_image, which would evaluate the same rays again
                coarse = self._coarse(unit, True)
                self._samples[unit] = (coarse, None if detail is None else self._values(unit, detail))
            total = sum(p.flux * self._full_samples(u) for p, u in zip(parts, units))
            adaptive = self._adaptive_rays(total, detail)
        self._shared = (detail, adaptive)

    def _full_samples(self, unit: LightProfile) -> np.ndarray:
        """The samples of ``unit`` at full supersampling kept by prepare_lensed, ``(pixels, ss, ss)``."""
        coarse, values = self._samples[unit]
        return self._all_pixels(coarse) if values is None else values

    def _unit_image(self, profile: LightProfile, lensed: bool) -> np.ndarray:
        if not lensed:
            return self._coarse(profile, lensed)
        coarse, values = self._samples.pop(profile, (None, None))
        image = self._coarse(profile, lensed) if coarse is None else coarse
        detail, adaptive = self._shared if self._shared is not None else (self._detail_rays((profile,)), None)
        if detail is not None:
            values = self._values(profile, detail) if values is None else values
        if self.adaptive and adaptive is None:  # flagged from this component alone
            adaptive = self._adaptive_rays(self._all_pixels(image) if detail is None else values, detail)
        if detail is not None:
            self._replace(image, detail, values)
        if adaptive is not None and adaptive.size:
            self._replace(image, adaptive, self._values(profile, adaptive))
            self.refined_pixels += adaptive.size
        return image

    def _cached(self, unit: LightProfile, lensed: bool) -> np.ndarray:
        key = (unit, lensed)
        image = self._cache.get(key)
        if image is None:
            image = self._cache[key] = self._unit_image(unit, lensed)
        return image

    def render(self, profile: LightProfile | None, lensed: bool) -> np.ndarray:
        """Counts per sample of ``profile`` (source plane if ``lensed``, else image plane)."""
        total = np.zeros((self.ray_map.grid.padded_size * self.sampling,) * 2)
        if profile is None:
            return total
        parts = profile.components if hasattr(profile, "components") else (profile,)
        for part in parts:
            if part.flux == 0 or isinstance(part, PointSource):
                continue
            total += part.flux * self._cached(part.with_flux(1.0), lensed)
        return total

def render_scene(band: str, ray_map: RayMap, lens_light: LightProfile | None, source: LightProfile,
                 components: ComponentImages | None = None, lensed_points: tuple = ()) -> Scene:
    """Evaluate the source at the rays' source-plane positions and the lens light at the image-plane
    positions, both as counts per fine pixel.  Point sources in the lens light (stars) are deposited
    on the grid; point sources behind the lens need their images found first and are refused here:
    pass the images as ``lensed_points`` (image-plane PointSource objects whose fluxes include
    |magnification|), deposited in the lensed-source plane.  Pass one ``components`` cache for all
    bands of a system to evaluate each shape once."""
    grid = ray_map.grid
    components = components if components is not None and components.ray_map is ray_map else ComponentImages(ray_map)
    if split_points(source)[1]:
        raise ValueError("render_scene: point sources behind the lens are not ray-traceable; "
                         "render their images as lens-plane PointSource objects instead")
    lensed = components.render(source, lensed=True)
    lens = components.render(lens_light, lensed=False)
    deposit_points(lens, grid, split_points(lens_light)[1], components.sampling)
    before = float(lensed.sum()) if lensed_points else 0.0
    deposit_points(lensed, grid, tuple(lensed_points), components.sampling)
    point_flux = float(lensed.sum()) - before if lensed_points else 0.0
    return Scene(band=band, grid=grid, lens_light=lens, lensed_source=lensed,
                 source_flux_unlensed=source.flux, sampling=components.sampling, lensed_point_flux=point_flux)
