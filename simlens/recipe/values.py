"""Checks of single recipe values (a number, an interval, a text choice, a distribution's support)
and how a value is shown in an error message."""

from __future__ import annotations

import difflib
import math
from typing import Any, Mapping

from ..errors import RecipeError
from .distributions import Fixed, LogNormal, Parameter, TruncatedNormal

__all__ = ["is_number", "range_text", "inside", "check_support", "check_number", "check_interval", "check_text",
           "shown"]

_INF = math.inf


def is_number(v: Any) -> bool:
    return isinstance(v, (int, float)) and not isinstance(v, bool)


def range_text(meta: Mapping) -> str:
    lo, hi = meta["low"], meta["high"]
    left = "(" if meta.get("low_open") or lo == -_INF else "["
    right = ")" if meta.get("high_open") or hi == _INF else "]"
    return f"{left}{lo:g}, {hi:g}{right}"


def inside(v: float, meta: Mapping) -> bool:
    lo, hi = meta["low"], meta["high"]
    above = v > lo if meta.get("low_open") else v >= lo
    below = v < hi if meta.get("high_open") else v <= hi
    return above and below and not math.isnan(v)


def check_support(origin: str, path: str, param: Parameter, meta: Mapping) -> None:
    lo, hi = param.support
    for v in (lo, hi):
        if not inside(v, meta):
            what = f"{param.describe()} can give {v:g}" if not isinstance(param, Fixed) else f"{v:g}"
            unit = f" {meta['unit']}" if meta.get("unit") else ""
            raise RecipeError(origin, path, f"out of range: {what}",
                              f"values in {range_text(meta)}{unit}" + (
                                  "; bound a normal with within = [low, high]"
                                  if isinstance(param, (TruncatedNormal, LogNormal)) else ""))


def check_number(origin: str, path: str, value: Any, meta: Mapping):
    if not is_number(value):
        raise RecipeError(origin, path, f"must be a number, got {shown(value)}",
                          f"a number in {range_text(meta)}")
    if meta.get("integer") and not float(value).is_integer():
        raise RecipeError(origin, path, f"must be a whole number, got {shown(value)}", "an integer")
    if not inside(float(value), meta):
        raise RecipeError(origin, path, f"out of range: {shown(value)}", f"values in {range_text(meta)}")
    return int(value) if meta.get("integer") else float(value)


def check_interval(origin: str, path: str, value: Any, meta: Mapping) -> tuple[float, float]:
    if not (isinstance(value, list) and len(value) == 2 and all(is_number(v) for v in value)):
        raise RecipeError(origin, path, f"must be [low, high], got {shown(value)}", "two numbers, low < high")
    lo, hi = float(value[0]), float(value[1])
    if not lo < hi:
        raise RecipeError(origin, path, f"needs low < high, got [{lo:g}, {hi:g}]", "two numbers, low < high")
    bounds = dict(meta, low_open=False, high_open=False)
    for v in (lo, hi):
        if not inside(v, bounds):
            unit = f" {meta['unit']}" if meta.get("unit") else ""
            raise RecipeError(origin, path, f"out of range: {v:g}", f"values in {range_text(bounds)}{unit}")
    return lo, hi


def check_text(origin: str, path: str, value: Any, meta: Mapping) -> str:
    choices = meta.get("choices", ())
    if not isinstance(value, str):
        raise RecipeError(origin, path, f"must be text, got {shown(value)}",
                          " or ".join(repr(c) for c in choices) if choices else "a quoted string")
    if choices and value not in choices:
        hint = difflib.get_close_matches(value, choices, n=1, cutoff=0.5)
        raise RecipeError(origin, path, f"unknown value {shown(value)}" + (f"; did you mean {hint[0]!r}?" if hint else ""),
                          ", ".join(repr(c) for c in choices))
    return value




def shown(value: Any) -> str:
    text_ = repr(value)
    return text_ if len(text_) <= 60 else text_[:57] + "..."


