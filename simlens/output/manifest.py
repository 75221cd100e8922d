"""Package versions recorded in the run manifest (which simlens.run_folder writes)."""

from __future__ import annotations

import platform
import sys
from importlib import metadata


__all__ = ["package_versions"]

_PACKAGES = ("simlens", "numpy", "scipy", "astropy", "galsim", "photutils", "tqdm")


def package_versions() -> dict:
    versions = {"python": sys.version.split()[0], "platform": platform.platform()}
    for name in _PACKAGES:
        try:
            versions[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            versions[name] = None
    return versions
