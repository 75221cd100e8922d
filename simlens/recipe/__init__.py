"""Recipes: TOML files that describe a survey, a cosmology and the lens and source populations.

``schema`` holds the frozen settings classes (the field metadata is the schema), ``distributions``
the parameter distributions a numeric key becomes, ``parsing`` reads TOML into them, ``values``
checks single values and ``checks`` the consistency across keys, one section at a time.
"""

from .distributions import AxisRatio, Choice, Fixed, Grid, LogNormal, LogUniform, Parameter, TruncatedNormal, Uniform
from .parsing import load_recipe, parse_recipe
from .schema import *  # noqa: F401,F403
from .schema import __all__ as _schema_all

__all__ = ["load_recipe", "parse_recipe", "Fixed", "Uniform", "LogUniform", "TruncatedNormal", "LogNormal", "AxisRatio",
           "Choice", "Grid",
           "Parameter", *_schema_all]
