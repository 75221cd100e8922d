"""The simlens version (one place: pyproject.toml reads it from here)."""

__version__ = "0.4.2"
