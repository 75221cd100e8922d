"""The run folder's state: its manifest, resuming an interrupted run, and verifying it.

The manifest (``manifest.json``) is rewritten atomically each time a shard finishes, listing every
finished shard's files with their SHA-256.  Killing a run at any moment leaves a consistent folder:
finished shards are recorded, files being written exist only under temporary names.  Running the
same command again checks the recorded shards, deletes stale temporary files, and renders only the
shards that are missing or damaged; the result is identical to an uninterrupted run.
"""

from __future__ import annotations

import hashlib
import json
import os
import re
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path

try:
    import fcntl
except ImportError:  # pragma: no cover - not a POSIX system: runs go unlocked
    fcntl = None

from ..version import __version__
from ..errors import SimlensError, clip
from ..output.atomic import atomic_path
from ..output.checksums import sha256_of
from ..output.ownership import confined
from ..output.manifest import package_versions
from ..recipe import Recipe
from .shards import ShardResult, part_size

__all__ = ["RunFolder", "VerifyReport", "verify_run"]

MANIFEST = "manifest.json"
FORMAT = "simlens-run/1"


def recipe_identity(recipe: Recipe) -> dict:
    """What must match for a run folder to be resumed with this recipe."""
    return {"recipe_sha256": hashlib.sha256(recipe.source_text.encode("utf-8")).hexdigest(),
            "seed": recipe.seed, "count": recipe.count, "shard_size": part_size(recipe),
            "per_system_files": recipe.output.per_system_files, "simlens": __version__}


def _now() -> str:
    return datetime.now(timezone.utc).isoformat(timespec="seconds")


def _lock(path: Path) -> int | None:
    """Take the run folder's lock: an exclusive ``flock`` on the folder itself (so the lock writes
    nothing into it), held until :meth:`RunFolder.release` or the process ends.  Returns the file
    descriptor, or None where the file system has no such locks (the run goes on unlocked)."""
    if fcntl is None:  # pragma: no cover
        return None
    try:
        fd = os.open(path, os.O_RDONLY)
    except OSError:
        return None
    try:
        fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
    except BlockingIOError:
        os.close(fd)
        raise SimlensError(f"{path}: another simlens make is writing this run folder; wait for it to finish "
                           f"(then run the same command to check or finish it), or choose another --out") from None
    except OSError:
        os.close(fd)
        return None
    return fd


@dataclass
class RunFolder:
    path: Path
    manifest: dict = field(default_factory=dict)
    lock: int | None = None  # descriptor holding the folder's flock (simlens make only)

    # -- opening ---------------------------------------------------------------------------------
    @classmethod
    def open(cls, path: Path, recipe: Recipe, overwrite: bool = False) -> "RunFolder":
        """Create a new run folder, or take up an unfinished one made by the same recipe and seed.
        The folder stays locked against other ``make`` processes until :meth:`release`."""
        path = Path(path)
        if path.exists() and not path.is_dir():
            raise SimlensError(f"{path}: exists and is not a folder; choose another --out")
        try:
            path.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise SimlensError(f"{path}: cannot create the run folder ({exc.strerror}); "
                               f"choose a writable --out") from None
        lock = _lock(path)
        try:
            folder = cls._open_locked(path, recipe, overwrite)
        except BaseException:
            if lock is not None:
                os.close(lock)
            raise
        folder.lock = lock
        return folder

    def release(self) -> None:
        """Let other processes open the folder again."""
        if self.lock is not None:
            os.close(self.lock)
            self.lock = None

    @classmethod
    def _open_locked(cls, path: Path, recipe: Recipe, overwrite: bool) -> "RunFolder":
        manifest_path = path / MANIFEST
        if any(path.iterdir()):
            if not manifest_path.is_file():
                raise SimlensError(f"{path}: folder is not empty and holds no simlens run; simlens writes only "
                                   f"into an empty folder or its own run folder: choose another --out")
            folder = cls(path, _load_manifest(manifest_path))
            if overwrite:
                folder._remove_own_files()
            elif folder.manifest.get("status") == "complete":
                raise SimlensError(f"{path}: a finished run already exists; pass --overwrite to replace it, "
                                   f"or choose another --out")
            elif folder.manifest.get("identity") != recipe_identity(recipe):
                raise SimlensError(f"{path}: holds an unfinished run of another recipe, seed or count; "
                                   f"run that command again to finish it, or pass --overwrite")
            else:
                folder._clean_temporaries()
                folder._drop_damaged_shards()
                folder.manifest["status"] = "running"
                folder.manifest.pop("failure", None)
                folder.save()
                return folder
        try:
            (path / ("fields" if recipe.field is not None else "shards")).mkdir(parents=True, exist_ok=True)
            if recipe.output.per_system_files:
                (path / "cutouts").mkdir(exist_ok=True)
        except OSError as exc:
            raise SimlensError(f"{path}: cannot create the run folder ({exc.strerror}); "
                               f"choose a writable --out") from None
        folder = cls(path, {
            "format": FORMAT, "simlens_run": recipe.name, "status": "running",
            "identity": recipe_identity(recipe), "recipe_file": recipe.origin, "recipe_text": recipe.source_text,
            "seed": recipe.seed, "count": recipe.count, "shard_size": part_size(recipe),
            "kind": "fields" if recipe.field is not None else "cutouts",
            "bands": list(recipe.survey.band_names), "reference_band": recipe.reference_band,
            "started_utc": _now(), "shards": {}, "seconds_by_stage": {}, "versions": package_versions()})
        folder.save()
        return folder

    # -- state -----------------------------------------------------------------------------------
    @property
    def finished(self) -> set[int]:
        return {int(k) for k in self.manifest.get("shards", {})}

    def record(self, result: ShardResult) -> None:
        self.manifest["shards"][str(result.spec.index)] = {
            "first_system": result.spec.first_system, "n_systems": result.spec.n_systems,
            "files": result.files, "selection": result.selection}
        stages = self.manifest.setdefault("seconds_by_stage", {})
        for key, value in result.timings.items():
            stages[key] = round(stages.get(key, 0.0) + value, 3)
        self.save()

    def complete(self, extra: dict) -> None:
        self.manifest.update(extra)
        self.manifest["status"] = "complete"
        self.manifest["finished_utc"] = _now()
        self.save()

    def fail(self, status: str, reason: str) -> None:
        """Mark an unfinished run as ``failed`` or ``interrupted`` (the same command resumes it)."""
        if self.manifest.get("status") == "running":
            self.manifest["status"] = status
            self.manifest["failure"] = clip(reason, 400)
            self.manifest["stopped_utc"] = _now()
            try:
                self.save()
            except OSError:  # a full disk: the run stays marked running, and resumes all the same
                pass

    def save(self) -> None:
        with atomic_path(self.path / MANIFEST) as tmp:
            tmp.write_text(json.dumps(self.manifest, indent=1, default=str) + "\n", encoding="utf-8")

    # -- repair ----------------------------------------------------------------------------------
    def own_files(self) -> list[Path]:
        """The files of this run: those its manifest names and those its layout names (shard, field,
        cutout and catalogue files, the manifest, and write-then-rename temporaries of them)."""
        named = set(self.manifest.get("truth", {}))
        for entry in self.manifest.get("shards", {}).values():
            named.update(entry.get("files", {}))
        found = {confined(self.path, relative, self.path / MANIFEST) for relative in named}
        for relative in _layout_files(self.path):
            found.add(self.path / relative)
        return sorted(p for p in found if p.is_file() and not p.is_symlink())

    def _remove_own_files(self) -> None:
        """Delete this run's files (:meth:`own_files`) and its layout folders once empty; everything
        else in the folder stays where it is."""
        for target in self.own_files():
            target.unlink()
        for sub in LAYOUT_FOLDERS:
            folder = self.path / sub
            if folder.is_dir() and not folder.is_symlink() and not any(folder.iterdir()):
                folder.rmdir()
        self.manifest = {}

    def _clean_temporaries(self) -> None:
        for relative in _layout_files(self.path):
            if _TEMPORARY.fullmatch(relative.name):
                (self.path / relative).unlink(missing_ok=True)

    def _drop_damaged_shards(self) -> None:
        damaged = [k for k, entry in self.manifest.get("shards", {}).items()
                   if _damaged_files(self.path, entry["files"])]
        for key in damaged:
            del self.manifest["shards"][key]
        if damaged:
            self.save()


# What a run writes, by folder: the only files --overwrite and resume may delete (besides those
# the manifest names).  A temporary is ".<final name>.tmp-<pid>" (simlens.output.atomic).
LAYOUT_FOLDERS = ("shards", "fields", "cutouts")
CATALOGUES = ("truth", "subhalos", "images", "line_of_sight", "field_objects", "neighbours", "light_curves", "epochs")
_LAYOUT = {
    ".": re.compile(rf"(manifest\.json|({'|'.join(CATALOGUES)})\.(fits|ecsv))"),
    "shards": re.compile(r"shard_\d+\.fits"),
    "fields": re.compile(r"field_\d+\.(fits|reg)"),
    "cutouts": re.compile(r"system_\d+\.fits"),
}
_TEMPORARY = re.compile(r"\.(?P<final>.+)\.tmp-\d+")


def _layout_files(root: Path) -> list[Path]:
    """Files under ``root`` whose names the run layout gives (final names and their temporaries)."""
    out = []
    for sub, pattern in _LAYOUT.items():
        folder = root / sub
        if not folder.is_dir() or folder.is_symlink():
            continue
        for child in folder.iterdir():
            temporary = _TEMPORARY.fullmatch(child.name)
            name = temporary.group("final") if temporary else child.name
            if pattern.fullmatch(name) and child.is_file() and not child.is_symlink():
                out.append(Path(sub) / child.name if sub != "." else Path(child.name))
    return out


def _damaged_files(root: Path, files: dict) -> list[str]:
    bad = []
    for relative, digest in files.items():
        target = confined(root, relative, root / MANIFEST)
        if not target.is_file() or sha256_of(target) != digest:
            bad.append(relative)
    return bad


def _load_manifest(path: Path) -> dict:
    try:
        manifest = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError) as exc:
        raise SimlensError(f"{path}: cannot be read as a simlens manifest ({exc}); "
                           f"simlens replaces only folders it can read as its own runs: choose another --out") from None
    if not isinstance(manifest, dict) or manifest.get("format") != FORMAT:
        found = manifest.get("format") if isinstance(manifest, dict) else None
        raise SimlensError(f"{path}: not a manifest this simlens can resume (format {clip(repr(found))})")
    shards = manifest.get("shards", {})
    sound = (all(isinstance(manifest.get(k), int) and manifest[k] >= 1 for k in ("count", "shard_size"))
             and isinstance(shards, dict) and all(str(k).isdigit() and isinstance(v, dict)
                                                  and isinstance(v.get("files", {}), dict) for k, v in shards.items())
             and isinstance(manifest.get("truth", {}), dict))
    if not sound:
        raise SimlensError(f"{path}: a damaged simlens manifest (count, shard_size or shard entries are not "
                           f"what simlens writes); make the run again into a new folder")
    return manifest


@dataclass(frozen=True)
class VerifyReport:
    folder: Path
    planned: int
    complete_run: bool
    missing: tuple  # shard indices not finished
    damaged: tuple  # (shard index or "truth", relative path)

    @property
    def ok(self) -> bool:
        return self.complete_run and not self.missing and not self.damaged

    def describe(self) -> str:
        lines = [f"{self.folder}: {self.planned} shard{'' if self.planned == 1 else 's'} planned, "
                 f"{self.planned - len(self.missing)} finished; run {'complete' if self.complete_run else 'unfinished'}"]
        if self.missing:
            shown = ", ".join(str(i) for i in self.missing[:20]) + (" ..." if len(self.missing) > 20 else "")
            lines.append(f"  missing shards: {shown}")
        for owner, relative in self.damaged:
            lines.append(f"  damaged or absent: {relative} (shard {owner})" if owner != "truth"
                         else f"  damaged or absent: {relative}")
        lines.append("  all files match the manifest" if self.ok else
                     "  run the same `simlens make` command again to re-render what is missing or damaged")
        return "\n".join(lines)


def verify_run(folder: Path) -> VerifyReport:
    """Check every shard (and the truth catalogue) of a run folder against its manifest."""
    folder = Path(folder)
    manifest_path = folder / MANIFEST
    if not manifest_path.is_file():
        raise SimlensError(f"{folder}: no {MANIFEST}; not a simlens run folder")
    manifest = _load_manifest(manifest_path)
    planned = -(-manifest["count"] // manifest["shard_size"])
    shards = manifest.get("shards", {})
    missing = tuple(i for i in range(planned) if str(i) not in shards)
    damaged = []
    for key in sorted(shards, key=int):
        damaged += [(int(key), rel) for rel in _damaged_files(folder, shards[key]["files"])]
    damaged += [("truth", rel) for rel in _damaged_files(folder, manifest.get("truth", {}))]
    return VerifyReport(folder=folder, planned=planned, complete_run=manifest.get("status") == "complete",
                        missing=missing, damaged=tuple(damaged))
