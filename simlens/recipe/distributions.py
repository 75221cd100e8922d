"""Recipe parameter distributions: the small frozen objects a numeric recipe key becomes.

Each draws from a ``numpy.random.Generator`` or maps uniform variates (``from_uniform``, on a number
or an array of any shape: every distribution here is drawn by its inverse CDF, so a system's
parameters cost one vector of uniforms) and knows its *support* (the closed range of values it can produce), which the recipe
validator compares with the range a parameter accepts *before* any work is done.

Grids: parameters given as ``{ grid = [...] }`` span a Cartesian product of cells (in the order the
recipe schema lists the parameters). System ``i`` takes cell ``i mod n_cells``
(:func:`simlens.truth.streams.grid_cell`); a count of ``k * n_cells`` gives ``k`` realisations of
every cell.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Union

import numpy as np
from scipy import special

__all__ = [
    "Fixed",
    "Uniform",
    "LogUniform",
    "TruncatedNormal",
    "LogNormal",
    "AxisRatio",
    "Choice",
    "Grid",
    "Parameter",
]


@dataclass(frozen=True)
class Fixed:
    """A parameter that always takes ``value``."""

    value: float

    def draw(self, rng: np.random.Generator) -> float:
        return self.value

    def from_uniform(self, u):
        return np.full(np.shape(u), float(self.value))

    @property
    def support(self) -> tuple[float, float]:
        return (self.value, self.value)

    def describe(self) -> str:
        return f"{self.value:g}"


@dataclass(frozen=True)
class Uniform:
    """Uniform on ``[low, high]``."""

    low: float
    high: float

    def __post_init__(self):
        if not self.high > self.low:
            raise ValueError(f"uniform needs low < high, got [{self.low}, {self.high}]")

    def draw(self, rng: np.random.Generator) -> float:
        return float(self.from_uniform(rng.uniform()))

    def from_uniform(self, u):
        return self.low + np.asarray(u, dtype=float) * (self.high - self.low)

    @property
    def support(self) -> tuple[float, float]:
        return (self.low, self.high)

    def describe(self) -> str:
        return f"uniform [{self.low:g}, {self.high:g}]"


@dataclass(frozen=True)
class LogUniform:
    """Uniform in ``log(value)`` on ``[low, high]``, with ``0 < low < high``."""

    low: float
    high: float

    def __post_init__(self):
        if not (self.low > 0 and self.high > self.low):
            raise ValueError(f"log_uniform needs 0 < low < high, got [{self.low}, {self.high}]")

    def draw(self, rng: np.random.Generator) -> float:
        return float(self.from_uniform(rng.uniform()))

    def from_uniform(self, u):
        lo = math.log(self.low)
        return np.exp(lo + np.asarray(u, dtype=float) * (math.log(self.high) - lo))

    @property
    def support(self) -> tuple[float, float]:
        return (self.low, self.high)

    def describe(self) -> str:
        return f"log-uniform [{self.low:g}, {self.high:g}]"


@dataclass(frozen=True)
class TruncatedNormal:
    """A normal distribution (``mean``, ``sigma``) truncated to ``[low, high]``.

    ``low``/``high`` may be infinite; the support is then unbounded on that side.
    Drawn by inverting the truncated CDF with scipy.special's ndtr/ndtri (the same values as
    scipy.stats.truncnorm.ppf, at a hundredth of the cost), one uniform per draw; a range above the
    mean is inverted on the mirrored side, where the CDF keeps its precision.
    """

    mean: float
    sigma: float
    low: float = -math.inf
    high: float = math.inf

    def __post_init__(self):
        if not self.sigma > 0:
            raise ValueError(f"normal needs sigma > 0, got {self.sigma}")
        if not self.high > self.low:
            raise ValueError(f"normal needs a range with low < high, got [{self.low}, {self.high}]")
        a, b = (self.low - self.mean) / self.sigma, (self.high - self.mean) / self.sigma
        if special.ndtr(b) - special.ndtr(a) < 1e-12:  # the standard normal CDF
            raise ValueError(
                f"normal({self.mean}, {self.sigma}) has no probability in [{self.low}, {self.high}]"
            )

    def draw(self, rng: np.random.Generator) -> float:
        return float(self.from_uniform(rng.uniform()))

    def from_uniform(self, u):
        u = np.asarray(u, dtype=float)
        a, b = (self.low - self.mean) / self.sigma, (self.high - self.mean) / self.sigma
        if a > 0:  # mirror: -x is a normal truncated to [-b, -a]
            lo, hi = special.ndtr(-b), special.ndtr(-a)
            x = -special.ndtri(hi - u * (hi - lo))
        else:
            lo, hi = special.ndtr(a), special.ndtr(b)
            x = special.ndtri(lo + u * (hi - lo))
        return np.minimum(np.maximum(self.mean + self.sigma * x, self.low), self.high)

    @property
    def support(self) -> tuple[float, float]:
        return (self.low, self.high)

    def describe(self) -> str:
        return f"normal({self.mean:g}, {self.sigma:g}) within [{self.low:g}, {self.high:g}]"


@dataclass(frozen=True)
class LogNormal:
    """``log10(value)`` normal about ``log10(median)`` with ``sigma_dex``, truncated to ``[low, high]``
    (``0 <= low < high``): :class:`TruncatedNormal` in the logarithm."""

    median: float
    sigma_dex: float
    low: float = 0.0
    high: float = math.inf

    def __post_init__(self):
        if not (self.median > 0 and self.low >= 0):
            raise ValueError(f"log_normal needs a median > 0 and within >= 0, got {self.median}, {self.low}")
        object.__setattr__(self, "_log", TruncatedNormal(
            math.log10(self.median), self.sigma_dex, math.log10(self.low) if self.low > 0 else -math.inf,
            math.log10(self.high) if math.isfinite(self.high) else math.inf))

    def draw(self, rng: np.random.Generator) -> float:
        return float(self.from_uniform(rng.uniform()))

    def from_uniform(self, u):
        return np.minimum(np.maximum(10.0 ** self._log.from_uniform(u), self.low), self.high)

    @property
    def support(self) -> tuple[float, float]:
        return (self.low, self.high)

    def describe(self) -> str:
        return f"log-normal (median {self.median:g}, {self.sigma_dex:g} dex) within [{self.low:g}, {self.high:g}]"


@dataclass(frozen=True)
class AxisRatio:
    """An axis ratio ``q`` whose ellipticity ``e = (1 - q) / (1 + q)`` has two Gaussian components of
    ``dispersion`` each (the intrinsic-shape model of weak-lensing forecasts, common practice), so
    ``|e|`` is Rayleigh-distributed; truncated at ``|e| <= max_ellipticity``."""

    dispersion: float
    max_ellipticity: float = 0.8

    def __post_init__(self):
        if not (0 < self.dispersion <= 1 and 0 < self.max_ellipticity < 1):
            raise ValueError(f"ellipticity_dispersion needs 0 < dispersion <= 1, got {self.dispersion}")

    def draw(self, rng: np.random.Generator) -> float:
        return float(self.from_uniform(rng.uniform()))

    def from_uniform(self, u):
        # Rayleigh CDF F(e) = 1 - exp(-e^2 / 2 s^2), inverted on [0, max_ellipticity]
        top = -math.expm1(-self.max_ellipticity**2 / (2 * self.dispersion**2))
        e = self.dispersion * np.sqrt(-2.0 * np.log1p(-np.asarray(u, dtype=float) * top))
        return (1.0 - e) / (1.0 + e)

    @property
    def support(self) -> tuple[float, float]:
        return ((1.0 - self.max_ellipticity) / (1.0 + self.max_ellipticity), 1.0)

    def describe(self) -> str:
        return f"axis ratio of ellipticity dispersion {self.dispersion:g} per component"


@dataclass(frozen=True)
class Choice:
    """One of ``values``, with optional ``weights`` (normalised here)."""

    values: tuple[float, ...]
    weights: tuple[float, ...] | None = None

    def __post_init__(self):
        if len(self.values) == 0:
            raise ValueError("choice needs at least one value")
        if self.weights is not None:
            if len(self.weights) != len(self.values):
                raise ValueError(
                    f"choice has {len(self.values)} values but {len(self.weights)} weights"
                )
            if any(w < 0 for w in self.weights) or sum(self.weights) <= 0:
                raise ValueError("choice weights must be >= 0 with a positive sum")

    def draw(self, rng: np.random.Generator) -> float:
        return float(self.from_uniform(rng.uniform()))

    def from_uniform(self, u):
        """The value whose cumulative weight first exceeds ``u`` (inverse CDF)."""
        n = len(self.values)
        weights = self.weights if self.weights is not None else (1.0,) * n
        target = np.asarray(u, dtype=float) * float(sum(weights))
        cumulative = np.cumsum(np.asarray(weights, dtype=float))
        usable = np.asarray(weights) > 0
        hit = (target[..., None] < cumulative) & usable
        last = max(j for j in range(n) if usable[j])
        index = np.where(hit.any(axis=-1), np.argmax(hit, axis=-1), last)
        return np.asarray(self.values, dtype=float)[index]

    @property
    def support(self) -> tuple[float, float]:
        return (min(self.values), max(self.values))

    def describe(self) -> str:
        return "choice of " + ", ".join(f"{v:g}" for v in self.values)


@dataclass(frozen=True)
class Grid:
    """Systematic values: the system's grid cell picks one (see the module docstring)."""

    values: tuple[float, ...]

    def __post_init__(self):
        if len(self.values) == 0:
            raise ValueError("grid needs at least one value")

    def draw(self, rng: np.random.Generator) -> float:  # pragma: no cover - guarded
        raise TypeError("grid parameters take their value from the system's grid cell")

    def from_uniform(self, u):  # pragma: no cover - guarded
        raise TypeError("grid parameters take their value from the system's grid cell")

    def at(self, index: int) -> float:
        return self.values[index]

    @property
    def support(self) -> tuple[float, float]:
        return (min(self.values), max(self.values))

    def describe(self) -> str:
        return "grid of " + ", ".join(f"{v:g}" for v in self.values)


Parameter = Union[Fixed, Uniform, LogUniform, TruncatedNormal, LogNormal, AxisRatio, Choice, Grid]


