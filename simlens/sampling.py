"""Parameter distributions, grids and per-system random streams.

Every numeric parameter of a recipe becomes one of the small frozen objects below. They draw from a
``numpy.random.Generator`` (or map one uniform variate, ``from_uniform``: every distribution here is
drawn by its inverse CDF, so a system's parameters cost one vector of uniforms) and know their *support* (the closed range of values they can produce),
which the recipe validator compares with the range a parameter accepts *before* any work is done.

Randomness: a run has one integer seed. System ``i`` draws everything from streams derived from
``numpy.random.SeedSequence(seed, spawn_key=(i,))`` (one Philox key per named stream), so a system can be re-drawn alone, identically,
whatever the order or the number of processes that draw the others.

Grids: parameters given as ``{ grid = [...] }`` span a Cartesian product of cells (in the order the
recipe schema lists the parameters). System ``i`` takes cell ``i mod n_cells``; a count of
``k * n_cells`` gives ``k`` realisations of every cell.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Sequence, Union

import numpy as np
from scipy import special, stats

__all__ = [
    "Fixed",
    "Uniform",
    "LogUniform",
    "TruncatedNormal",
    "Choice",
    "Grid",
    "Parameter",
    "system_streams",
    "field_streams",
    "grid_cell",
]


@dataclass(frozen=True)
class Fixed:
    """A parameter that always takes ``value``."""

    value: float

    def draw(self, rng: np.random.Generator) -> float:
        return self.value

    def from_uniform(self, u: float) -> float:
        return self.value

    def from_uniforms(self, u: np.ndarray) -> np.ndarray:
        """``from_uniform`` of every entry of ``u`` (vectorised; used by simlens.block_sampling)."""
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
        return self.from_uniform(rng.uniform())

    def from_uniform(self, u: float) -> float:
        return self.low + u * (self.high - self.low)

    def from_uniforms(self, u: np.ndarray) -> np.ndarray:
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
        return self.from_uniform(rng.uniform())

    def from_uniform(self, u: float) -> float:
        lo = math.log(self.low)
        return math.exp(lo + u * (math.log(self.high) - lo))

    def from_uniforms(self, u: np.ndarray) -> np.ndarray:
        lo = math.log(self.low)
        t = lo + np.asarray(u, dtype=float) * (math.log(self.high) - lo)
        # math.exp, not np.exp: the same values as from_uniform to the last bit
        return np.fromiter((math.exp(v) for v in t.ravel()), float, t.size).reshape(t.shape)

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
        if stats.norm.cdf(b) - stats.norm.cdf(a) < 1e-12:
            raise ValueError(
                f"normal({self.mean}, {self.sigma}) has no probability in [{self.low}, {self.high}]"
            )

    def draw(self, rng: np.random.Generator) -> float:
        return self.from_uniform(rng.uniform())

    def from_uniform(self, u: float) -> float:
        a, b = (self.low - self.mean) / self.sigma, (self.high - self.mean) / self.sigma
        if a > 0:  # mirror: -x is a normal truncated to [-b, -a]
            lo, hi = special.ndtr(-b), special.ndtr(-a)
            x = -special.ndtri(hi - u * (hi - lo))
        else:
            lo, hi = special.ndtr(a), special.ndtr(b)
            x = special.ndtri(lo + u * (hi - lo))
        return float(min(max(self.mean + self.sigma * x, self.low), self.high))

    def from_uniforms(self, u: np.ndarray) -> np.ndarray:
        u = np.asarray(u, dtype=float)
        a, b = (self.low - self.mean) / self.sigma, (self.high - self.mean) / self.sigma
        if a > 0:
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
        return self.from_uniform(rng.uniform())

    def from_uniform(self, u: float) -> float:
        """The value whose cumulative weight first exceeds ``u`` (inverse CDF)."""
        n = len(self.values)
        weights = self.weights if self.weights is not None else (1.0,) * n
        target = u * float(sum(weights))
        cumulative = 0.0
        for value, w in zip(self.values, weights):
            cumulative += w
            if target < cumulative and w > 0:
                return value
        return next(v for v, w in zip(reversed(self.values), reversed(weights)) if w > 0)

    def from_uniforms(self, u: np.ndarray) -> np.ndarray:
        n = len(self.values)
        weights = self.weights if self.weights is not None else (1.0,) * n
        target = np.asarray(u, dtype=float) * float(sum(weights))
        cumulative = np.cumsum(np.asarray(weights, dtype=float))  # running sums, as from_uniform adds them
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

    def from_uniform(self, u: float) -> float:  # pragma: no cover - guarded
        raise TypeError("grid parameters take their value from the system's grid cell")

    def at(self, index: int) -> float:
        return self.values[index]

    @property
    def support(self) -> tuple[float, float]:
        return (min(self.values), max(self.values))

    def describe(self) -> str:
        return "grid of " + ", ".join(f"{v:g}" for v in self.values)


Parameter = Union[Fixed, Uniform, LogUniform, TruncatedNormal, Choice, Grid]


class _Streams(dict):
    """The named generators of one system, each made on first use (most draws use a few): a Philox
    counter-based generator keyed by 128 bits of the system's SeedSequence state per name."""

    def __init__(self, names: Sequence[str], state: np.ndarray):
        super().__init__()
        self._keys = {name: state[2 * i:2 * i + 2] for i, name in enumerate(names)}

    def __missing__(self, name: str) -> np.random.Generator:
        rng = np.random.Generator(np.random.Philox(key=self._keys[name]))
        self[name] = rng
        return rng


def system_streams(seed: int, system_id: int, names: Sequence[str], candidate: int = 0) -> dict[str, np.random.Generator]:
    """Independent generators for one system, one per named purpose.

    The streams depend only on ``(seed, system_id, candidate)`` and the position of each name in
    ``names``, never on which process draws the system or in which order.  ``candidate`` numbers the
    redraws of a system that selection cuts rejected (0: the first draw).
    """
    key = (int(system_id),) if candidate == 0 else (int(system_id), int(candidate))
    root = np.random.SeedSequence(entropy=int(seed), spawn_key=key)
    return _Streams(names, root.generate_state(2 * len(names), np.uint64))


# Spawn-key tag of field streams: system streams use keys of one or two words, so a three-word key
# never meets one of them.
_FIELD_TAG = 0x6669656C64  # "field"


def field_streams(seed: int, field_index: int, names: Sequence[str]) -> dict[str, np.random.Generator]:
    """Independent generators for one field image (lens places, background objects, noise), apart
    from every system's streams; they depend only on ``(seed, field_index)``."""
    root = np.random.SeedSequence(entropy=int(seed), spawn_key=(int(field_index), 0, _FIELD_TAG))
    return _Streams(names, root.generate_state(2 * len(names), np.uint64))


def grid_cell(system_id: int, grid_sizes: Sequence[int]) -> tuple[int, ...]:
    """Indices into each grid parameter for ``system_id`` (cell ``system_id mod n_cells``)."""
    if not grid_sizes:
        return ()
    n_cells = int(np.prod(grid_sizes))
    return tuple(int(i) for i in np.unravel_index(system_id % n_cells, tuple(grid_sizes)))
