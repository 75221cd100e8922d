"""Ray shooting: the lensed, noiseless scene of one system, per band, before the PSF.

Pixel convention (documented once here, tested in tests/test_output.py): a cutout of ``N x N``
pixels of side ``s`` arcsec has its centre at 0-based pixel index ``((N - 1) / 2, (N - 1) / 2)``, i.e.
at the 1-based FITS reference pixel ``CRPIX = (N + 1) / 2``.  Pixel ``(row, col)`` is centred at
``x = (col - (N - 1) / 2) s`` and ``y = (row - (N - 1) / 2) s`` arcsec; arrays are indexed
``[row, col] = [y, x]``.  For even ``N`` the lens centre lies on a pixel corner.

The scene is computed on a *padded, supersampled* grid: ``padding`` extra pixels on every side (so
that the PSF can spread light from outside the cutout into it) and ``supersampling^2`` rays per
pixel.  The deflection is achromatic, so the ray map is computed once per system and reused for all
bands.  Each fine pixel gets ``surface_brightness(beta) * fine_pixel_area`` (the midpoint rule),
which conserves surface brightness (lensing changes the solid angle, not the surface brightness).
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
    """Image-plane positions of rays and where they land in the source plane (arcsec).

    ``x, y, beta_x, beta_y`` cover the *inner* region at full supersampling: the padded field less
    ``inset`` pixels on every side (``inset = 0``: the whole field).  When ``inset > 0`` the whole
    padded field is also traced more coarsely, ``outer_sampling`` rays per pixel side, in ``outer``
    (``(x, y, beta_x, beta_y)``): light there reaches the cutout only through the PSF's wings."""

    grid: PixelGrid
    x: np.ndarray
    y: np.ndarray
    beta_x: np.ndarray
    beta_y: np.ndarray
    inset: int = 0
    outer: tuple | None = None
    outer_sampling: int | None = None
    mass: MassModel | None = None  # kept for adaptive refinement (more rays where needed)

    @property
    def axes(self) -> tuple[np.ndarray, np.ndarray]:
        """Image-plane x and y coordinates (lens frame) of the full-resolution rays."""
        k = self.inset * self.grid.supersampling
        axis = self.grid.fine_axis()
        return self.grid.in_lens_frame(axis[k:axis.size - k] if k else axis)


def trace_rays(mass: MassModel, grid: PixelGrid, outer_sampling: int | None = None,
               margin: int | None = None) -> RayMap:
    """Shoot one ray through each fine pixel centre: ``beta = theta - alpha(theta)``.

    With ``outer_sampling`` (dividing the supersampling) and ``margin`` (pixels), only the cutout
    plus ``margin`` pixels on each side is traced at full supersampling, and the rest of the padded
    field at ``outer_sampling`` rays per pixel side."""
    inset = 0
    if outer_sampling is not None and margin is not None and margin < grid.padding:
        if grid.supersampling % outer_sampling:
            raise ValueError(f"outer_sampling {outer_sampling} must divide the supersampling {grid.supersampling}")
        inset = grid.padding - margin
    k = inset * grid.supersampling
    axis = grid.fine_axis()
    x, y = np.meshgrid(*grid.in_lens_frame(axis[k:axis.size - k] if k else axis))
    beta_x, beta_y = mass.ray_shoot(x, y)
    outer = None
    if inset:
        ox, oy = np.meshgrid(*grid.in_lens_frame(grid.sample_axis(outer_sampling)))
        outer = (ox, oy) + tuple(mass.ray_shoot(ox, oy))
    return RayMap(grid=grid, x=x, y=y, beta_x=beta_x, beta_y=beta_y, inset=inset, outer=outer,
                  outer_sampling=outer_sampling if inset else None, mass=mass)


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


def deposit_points(image: np.ndarray, grid: PixelGrid, points: tuple, sampling: int | None = None) -> None:
    """Add point sources to an image of the padded field with ``sampling`` samples per pixel side
    (default: the ray grid's) by cloud-in-cell weights: flux-conserving, and a point at a sample's
    centre lands in that sample alone.  Points outside the padded field are dropped."""
    sampling = sampling or grid.supersampling
    n = grid.padded_size * sampling
    scale = grid.pixel_scale / sampling
    ox, oy = grid.lens_offset  # points are in the lens frame
    for p in points:
        fx = (p.center[0] + ox) / scale + 0.5 * n - 0.5
        fy = (p.center[1] + oy) / scale + 0.5 * n - 0.5
        ix, iy = int(np.floor(fx)), int(np.floor(fy))
        wx, wy = fx - ix, fy - iy
        for dy, wy_ in ((0, 1 - wy), (1, wy)):
            for dx, wx_ in ((0, 1 - wx), (1, wx)):
                r, c = iy + dy, ix + dx
                if 0 <= r < n and 0 <= c < n and wx_ * wy_ > 0:
                    image[r, c] += p.flux * wx_ * wy_


# Image-plane (unlensed) components are re-integrated around their centres, where cuspy profiles
# (Sersic n ~ 4 holds ~10 % of its light inside 0.1 R_e) defeat the midpoint rule: the fine pixels
# within CENTRE_REFINE_HALF_WIDTH of the centre get CENTRE_REFINE_FACTOR^2 sub-samples each.
CENTRE_REFINE_HALF_WIDTH = 4
CENTRE_REFINE_FACTOR = 8


def refine_centre(unit: np.ndarray, profile: LightProfile, axes: tuple, scale: float) -> None:
    """Replace the samples around ``profile.center`` by sub-sampled averages (in place); ``axes``
    hold the sample centres along the x and y axes of ``unit`` and ``scale`` their spacing (arcsec)."""
    x_axis, y_axis = axes
    n, h, m = x_axis.size, CENTRE_REFINE_HALF_WIDTH, CENTRE_REFINE_FACTOR
    cx = int(round((profile.center[0] - x_axis[0]) / scale))
    cy = int(round((profile.center[1] - y_axis[0]) / scale))
    r0, r1 = max(cy - h, 0), min(cy + h + 1, n)
    c0, c1 = max(cx - h, 0), min(cx + h + 1, n)
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


class ComponentImages:
    """Unit-flux images of light components on one ray map, computed once and reused.

    Shapes are achromatic (bands differ only in each component's flux), so a system's bands share
    every evaluation of a profile: the cache key is the component with its flux set to 1.
    Unlensed components are refined around their centres (:func:`refine_centre`).  With ``sampling``
    below the ray grid's supersampling, each unit image is block-summed to it once, so that the
    bands' linear combinations and the PSF stage work on the smaller arrays."""

    def __init__(self, ray_map: RayMap, sampling: int | None = None, adaptive: bool = False):
        ss = ray_map.grid.supersampling
        sampling = sampling or ss
        if ss % sampling:
            raise ValueError(f"sampling {sampling} must divide the supersampling {ss}")
        if ray_map.outer is not None and sampling != ray_map.outer_sampling:
            raise ValueError(f"a ray map traced at {ray_map.outer_sampling} rays per pixel outside the "
                             f"cutout renders at that sampling, not {sampling}")
        if adaptive and ray_map.mass is None:
            raise ValueError("adaptive sampling needs a ray map that keeps its mass model (trace_rays does)")
        self.ray_map = ray_map
        self.sampling = sampling
        self.adaptive = adaptive
        self.refined_pixels = 0  # how many pixel refinements were made (for benchmarks)
        self._cache: dict = {}
        self._fine: dict = {}  # unit-flux lensed components at full resolution, from prepare_lensed
        self._shared_refinement = None  # (flagged pixels, their rays) from prepare_lensed

    def _reduce(self, fine: np.ndarray) -> np.ndarray:
        factor = self.ray_map.grid.supersampling // self.sampling
        if factor == 1:
            return fine
        n = fine.shape[0] // factor
        return fine.reshape(n, factor, n, factor).sum(axis=(1, 3))

    def _unit_image(self, profile: LightProfile, lensed: bool) -> np.ndarray:
        rm = self.ray_map
        grid = rm.grid
        x, y = (rm.beta_x, rm.beta_y) if lensed else (rm.x, rm.y)
        inner = self._fine.pop(profile, None) if lensed else None
        if inner is None:
            inner = profile.surface_brightness(x, y) * grid.fine_pixel_area
        if not lensed and hasattr(profile, "center"):
            refine_centre(inner, profile, rm.axes, grid.fine_scale)
        refinement = None
        if lensed and self.adaptive:
            refinement = self._shared_refinement or self._trace_refinement(self._flag(inner))
        inner = self._reduce(inner)
        if refinement is not None and refinement[0][0].size:
            self._refine(inner, profile, refinement)
        if rm.outer is None:
            return inner
        ox, oy, obx, oby = rm.outer
        scale = grid.pixel_scale / self.sampling
        image = profile.surface_brightness(*((obx, oby) if lensed else (ox, oy))) * scale * scale
        k = rm.inset * self.sampling
        image[k:image.shape[0] - k, k:image.shape[1] - k] = inner
        return image

    def _flag(self, fine: np.ndarray):
        """Pixels (row, col indices of the full-resolution region) whose rays disagree."""
        ss = self.ray_map.grid.supersampling
        n = fine.shape[0] // ss
        blocks = fine.reshape(n, ss, n, ss)
        spread = (blocks.max(axis=(1, 3)) - blocks.min(axis=(1, 3))) * ss * ss
        peak = blocks.sum(axis=(1, 3)).max()
        if peak <= 0:
            return np.empty(0, int), np.empty(0, int)
        return np.nonzero(spread > ADAPTIVE_TOLERANCE * peak)

    def prepare_lensed(self, source: LightProfile) -> None:
        """Flag the pixels to refine once, from the whole lensed ``source`` (all its components), and
        trace their rays once; every lensed component is then refined on those pixels.  Call before
        rendering a system's bands (``render_system`` does); without it each component is flagged
        and traced on its own."""
        if not self.adaptive:
            return
        rm, grid = self.ray_map, self.ray_map.grid
        parts = source.components if hasattr(source, "components") else (source,)
        total = np.zeros_like(rm.beta_x)
        for part in parts:
            if part.flux > 0 and not isinstance(part, PointSource):
                unit = part.with_flux(1.0)
                fine = self._fine.get(unit)
                if fine is None:  # kept for _unit_image, which would evaluate the same rays again
                    fine = unit.surface_brightness(rm.beta_x, rm.beta_y) * grid.fine_pixel_area
                    self._fine[unit] = fine
                total += part.flux * fine
        self._shared_refinement = self._trace_refinement(self._flag(total))

    def _trace_refinement(self, flagged):
        """The rays of the flagged pixels, ADAPTIVE_FACTOR times more per side."""
        rm, grid = self.ray_map, self.ray_map.grid
        rows, cols = flagged
        per_side = grid.supersampling * ADAPTIVE_FACTOR
        offsets = ((np.arange(per_side) + 0.5) / per_side - 0.5) * grid.pixel_scale
        to_centre = 0.5 * (grid.pixel_scale - grid.fine_scale)  # from a pixel's first ray to its centre
        x_axis, y_axis = rm.axes
        cx = x_axis[0] + to_centre + cols * grid.pixel_scale
        cy = y_axis[0] + to_centre + rows * grid.pixel_scale
        gx = cx[:, None, None] + offsets[None, None, :]
        gy = cy[:, None, None] + offsets[None, :, None]
        gx, gy = np.broadcast_arrays(gx, gy)
        if rows.size == 0:
            return flagged, (gx, gy)
        return flagged, rm.mass.ray_shoot(gx, gy)

    def _refine(self, reduced: np.ndarray, profile: LightProfile, refinement) -> None:
        """Replace the flagged pixels by the average over their refined rays (in place)."""
        grid, s = self.ray_map.grid, self.sampling
        (rows, cols), (bx, by) = refinement
        per_side = grid.supersampling * ADAPTIVE_FACTOR
        sub_area = (grid.pixel_scale / per_side) ** 2
        sb = profile.surface_brightness(bx, by) * sub_area  # (n, per_side, per_side) as [row, col]
        k = per_side // s
        blocks = sb.reshape(-1, s, k, s, k).sum(axis=(2, 4))
        for index, (r, c) in enumerate(zip(rows, cols)):
            reduced[r * s:(r + 1) * s, c * s:(c + 1) * s] = blocks[index]
        self.refined_pixels += int(rows.size)

    def render(self, profile: LightProfile | None, lensed: bool) -> np.ndarray:
        """Counts per sample of ``profile`` (source plane if ``lensed``, else image plane)."""
        total = np.zeros((self.ray_map.grid.padded_size * self.sampling,) * 2)
        if profile is None:
            return total
        parts = profile.components if hasattr(profile, "components") else (profile,)
        for part in parts:
            if part.flux == 0 or isinstance(part, PointSource):
                continue
            key = (part.with_flux(1.0), lensed)
            unit = self._cache.get(key)
            if unit is None:
                unit = self._unit_image(key[0], lensed)
                self._cache[key] = unit
            total += part.flux * unit
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
