"""The run manifest (JSON): what was run, with what, and how long it took."""

from __future__ import annotations

import json
import platform
import sys
from importlib import metadata
from pathlib import Path

from .atomic import atomic_path

__all__ = ["package_versions", "write_manifest"]

_PACKAGES = ("simlens", "numpy", "scipy", "astropy", "galsim", "photutils", "tqdm")


def package_versions() -> dict:
    versions = {"python": sys.version.split()[0], "platform": platform.platform()}
    for name in _PACKAGES:
        try:
            versions[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            versions[name] = None
    return versions


def write_manifest(folder: Path, content: dict) -> Path:
    path = Path(folder) / "manifest.json"
    content = dict(content)
    content.setdefault("versions", package_versions())
    with atomic_path(path) as tmp:
        tmp.write_text(json.dumps(content, indent=2, sort_keys=False, default=str) + "\n", encoding="utf-8")
    return path
