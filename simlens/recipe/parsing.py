"""Reading a recipe: TOML text -> the frozen settings of :mod:`simlens.recipe.schema`, every key
checked against its field's metadata, then the checks across keys (:mod:`simlens.recipe.checks`)."""

from __future__ import annotations

import dataclasses
import difflib
import math
import re
import tomllib
from pathlib import Path
from typing import Any, Mapping

from ..errors import RecipeError
from .checks import check_recipe
from .distributions import AxisRatio, Choice, Fixed, Grid, LogNormal, LogUniform, Parameter, TruncatedNormal, Uniform
from .schema import BandSettings, Recipe
from .values import check_interval, check_number, check_support, check_text, is_number, shown

__all__ = ["load_recipe", "parse_recipe"]

def load_recipe(path: str | Path) -> Recipe:
    """Read and validate a recipe file; raises :class:`~simlens.errors.RecipeError`."""
    path = Path(path)
    try:
        raw = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise RecipeError(str(path), "", "file not found") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise RecipeError(str(path), "", f"cannot be read: {exc}") from None
    return parse_recipe(raw, origin=str(path), default_name=path.stem)


def parse_recipe(raw: str, origin: str = "<recipe>", default_name: str = "simlens-run") -> Recipe:
    """Validate recipe text (TOML) into a :class:`Recipe`."""
    try:
        data = tomllib.loads(raw)
    except tomllib.TOMLDecodeError as exc:
        raise RecipeError(origin, "", f"is not valid TOML: {exc}") from None
    except RecursionError:
        raise RecipeError(origin, "", "is nested too deeply to be read",
                          "tables and arrays a few levels deep, as in recipes/demo.toml") from None
    _check_finite(origin, data, "")
    data = dict(data)
    data.setdefault("name", default_name)
    recipe = _build(Recipe, data, origin, "")
    recipe = dataclasses.replace(recipe, source_text=raw, origin=origin)
    check_recipe(recipe)
    return recipe


_INTERNAL_FIELDS = {"source_text", "origin"}
_MAX_DEPTH = 8  # the schema's deepest key is four tables down; anything deeper is not a recipe


def _check_finite(origin: str, value: Any, path: str, depth: int = 0) -> None:
    """Every number in a recipe is finite (TOML allows nan and inf), and nothing nests deeper than
    the schema does; the first offender is named by its key path."""
    if depth > _MAX_DEPTH:
        raise RecipeError(origin, path, "is nested too deeply", "tables and arrays as in recipes/demo.toml")
    if isinstance(value, float) and not math.isfinite(value):
        raise RecipeError(origin, path or "(top level)", f"must be a finite number, got {value!r}",
                          "a finite number")
    if isinstance(value, Mapping):
        for key, item in value.items():
            _check_finite(origin, item, f"{path}.{key}" if path else str(key), depth + 1)
    elif isinstance(value, list):
        for i, item in enumerate(value):
            _check_finite(origin, item, f"{path}[{i}]", depth + 1)


def _build(cls, data: Any, origin: str, prefix: str):
    where = prefix.rstrip(".") or "(top level)"
    if not isinstance(data, Mapping):
        raise RecipeError(origin, where, f"must be a table, got {shown(data)}", "a TOML table [ ... ]")
    fields = {f.name: f for f in dataclasses.fields(cls)
              if f.name not in _INTERNAL_FIELDS and not (cls is BandSettings and f.name == "name")}
    for key in data:
        if key not in fields:
            hint = difflib.get_close_matches(key, list(fields), n=1, cutoff=0.5)
            accepted = f"did you mean '{hint[0]}'?" if hint else "one of " + ", ".join(sorted(fields))
            raise RecipeError(origin, f"{prefix}{key}", "unknown key", accepted)
    values = {}
    for name, f in fields.items():
        path = f"{prefix}{name}"
        kind = f.metadata.get("kind")
        if name not in data:
            if f.default is dataclasses.MISSING and f.default_factory is dataclasses.MISSING:
                if kind == "bands":
                    raise RecipeError(origin, path, "required", "at least one [survey.bands.NAME] table")
                unit = f.metadata.get("unit")
                raise RecipeError(origin, path, "required", f.metadata.get("doc", "") + (f", {unit}" if unit else ""))
            if kind == "table" and f.default_factory is not dataclasses.MISSING:
                # an absent table takes its defaults, and names any key it cannot do without
                values[name] = _build(f.metadata["cls"], {}, origin, path + ".")
            continue
        value = data[name]
        if kind == "parameter":
            values[name] = _parse_parameter(origin, path, value, f.metadata)
        elif kind == "number":
            values[name] = check_number(origin, path, value, f.metadata)
        elif kind == "text":
            values[name] = check_text(origin, path, value, f.metadata)
        elif kind == "flag":
            if not isinstance(value, bool):
                raise RecipeError(origin, path, f"must be true or false, got {shown(value)}", "true, false")
            values[name] = value
        elif kind == "table":
            values[name] = _build(f.metadata["cls"], value, origin, path + ".")
        elif kind == "bands":
            values[name] = _parse_bands(origin, path, value)
        elif kind == "band_colors":
            values[name] = _parse_colors(origin, path, value)
        elif kind == "interval":
            values[name] = check_interval(origin, path, value, f.metadata)
        else:  # pragma: no cover - schema bug
            raise AssertionError(f"field {cls.__name__}.{name} has no kind")
    return cls(**values)


_BAND_NAME_MAX = 16
_BAND_NAME = re.compile(rf"[A-Za-z0-9][A-Za-z0-9_-]{{0,{_BAND_NAME_MAX - 1}}}")


def _parse_bands(origin: str, path: str, value: Any) -> tuple:
    if not isinstance(value, Mapping) or not value:
        raise RecipeError(origin, path, f"must hold one table per band, got {shown(value)}",
                          "[survey.bands.g], [survey.bands.r], ...")
    bands = []
    for band_name, band_data in value.items():
        if not _BAND_NAME.fullmatch(band_name):
            # band names become FITS column names (arc_snr_<band>, ...) and header values
            raise RecipeError(origin, f"{path}.{shown(band_name)}", "is not a usable band name",
                              f"1 to {_BAND_NAME_MAX} ASCII letters, digits, '_' or '-'")
        band = _build(BandSettings, band_data, origin, f"{path}.{band_name}.")
        bands.append(dataclasses.replace(band, name=band_name))
    return tuple(bands)


def _parse_colors(origin: str, path: str, value: Any) -> dict:
    if not isinstance(value, Mapping):
        raise RecipeError(origin, path, f"must be a table of band = colour, got {shown(value)}",
                          "e.g. colors = { g = 0.8, i = -0.3 }")
    return {band: _parse_parameter(origin, f"{path}.{band}", v, dict(kind="parameter", low=-20, high=20))
            for band, v in value.items()}


_FORMS = ("a number, { uniform = [low, high] }, { log_uniform = [low, high] }, "
          "{ normal = [mean, sigma], within = [low, high] }, { log_normal = [median, sigma_dex], within = [low, high] }, "
          "{ ellipticity_dispersion = sigma } (an axis ratio), { choice = [...], weights = [...] } or { grid = [...] }")


def _parse_parameter(origin: str, path: str, value: Any, meta: Mapping) -> Parameter:
    integer = meta.get("integer", False)
    if is_number(value):
        param: Parameter = Fixed(value)
    elif isinstance(value, Mapping):
        forms = {"uniform", "log_uniform", "normal", "log_normal", "ellipticity_dispersion", "choice", "grid"}
        chosen = [k for k in value if k in forms]
        extras = {k for k in value if k not in forms}
        if len(chosen) != 1:
            raise RecipeError(origin, path, f"needs exactly one distribution, got {shown(value)}", _FORMS)
        form = chosen[0]
        allowed_extras = {"normal": {"within"}, "log_normal": {"within"}, "choice": {"weights"}}.get(form, set())
        if extras - allowed_extras:
            bad = sorted(extras - allowed_extras)[0]
            hint = sorted(allowed_extras)
            raise RecipeError(origin, f"{path}.{bad}", f"unknown key for a {form} distribution",
                              f"{hint[0]}" if hint else "no other key")
        args = value[form]
        try:
            param = _make_distribution(form, args, value)
        except (TypeError, ValueError) as exc:
            raise RecipeError(origin, path, f"{exc}", _FORMS) from None
        if integer and form in ("uniform", "log_uniform", "normal", "log_normal", "ellipticity_dispersion"):
            raise RecipeError(origin, path, f"must be an integer, so a {form} distribution does not fit",
                              "an integer, { choice = [...] } or { grid = [...] }")
    else:
        raise RecipeError(origin, path, f"must be a number or a distribution, got {shown(value)}", _FORMS)
    if integer:
        values = [param.value] if isinstance(param, Fixed) else list(param.values)
        if not all(float(v).is_integer() for v in values):
            raise RecipeError(origin, path, f"must be an integer, got {shown(value)}", "whole numbers")
    check_support(origin, path, param, meta)
    return param


def _number_list(args: Any, form: str, size: int | None = None) -> tuple[float, ...]:
    if not isinstance(args, list) or not all(is_number(a) for a in args):
        raise ValueError(f"{form} needs a list of numbers, got {shown(args)}")
    if size is not None and len(args) != size:
        raise ValueError(f"{form} needs {size} numbers, got {len(args)}")
    return tuple(args)


def _make_distribution(form: str, args: Any, table_: Mapping) -> Parameter:
    if form == "uniform":
        low, high = _number_list(args, "uniform", 2)
        return Uniform(low, high)
    if form == "log_uniform":
        low, high = _number_list(args, "log_uniform", 2)
        return LogUniform(low, high)
    if form == "normal":
        mean, sigma = _number_list(args, "normal", 2)
        low, high = _number_list(table_.get("within", [-math.inf, math.inf]), "within", 2)
        return TruncatedNormal(mean, sigma, low, high)
    if form == "log_normal":
        median, sigma = _number_list(args, "log_normal", 2)
        low, high = _number_list(table_.get("within", [0.0, math.inf]), "within", 2)
        return LogNormal(median, sigma, low, high)
    if form == "ellipticity_dispersion":
        if not is_number(args):
            raise ValueError(f"ellipticity_dispersion needs a number, got {shown(args)}")
        return AxisRatio(float(args))
    if form == "choice":
        values = _number_list(args, "choice")
        weights = table_.get("weights")
        return Choice(values, None if weights is None else _number_list(weights, "weights"))
    values = _number_list(args, "grid")
    return Grid(values)


