"""What simlens may touch in a folder: only files inside it that a record of its own names.

A run's manifest and an injection's or a forecast's record list the files simlens wrote.  Before anything listed
there is read, checked or deleted, :func:`confined` makes sure the entry is a plain relative path
that stays inside the folder (no ``..``, no absolute path, no symbolic link on the way): an edited
record can never make simlens open or remove a file elsewhere.
"""

from __future__ import annotations

import json
from pathlib import Path

from ..errors import SimlensError

__all__ = ["confined", "shown", "claim_folder", "write_record"]


def confined(root: Path, relative: str, record: Path) -> Path:
    """``root / relative`` for an entry of ``record``; a SimlensError when it leaves ``root``."""
    entry = Path(str(relative))
    target = root / entry
    inside = (not entry.is_absolute() and ".." not in entry.parts
              and not any((root / Path(*entry.parts[:k])).is_symlink() for k in range(1, len(entry.parts) + 1))
              and target.resolve().is_relative_to(root.resolve()))
    if not inside:
        raise SimlensError(f"{record}: lists {shown(relative)}, which is not a file inside {root}; the record was "
                           f"edited or damaged: choose another folder")
    return target


def shown(value, limit: int = 80) -> str:
    """``repr`` of a user-given value, cut to about ``limit`` characters for an error message."""
    text = repr(str(value))
    return text if len(text) <= limit else text[:limit - 4] + "...'"


def claim_folder(out: Path, overwrite: bool, record_name: str, record_format: str, what: str,
                 subfolders: tuple = ()) -> None:
    """Make ``out`` ready for a command's output: an empty or new folder, or (with ``overwrite``) a
    folder of an earlier ``what`` (its ``record_name`` of ``record_format`` lists its files),
    whose recorded files are removed; a folder holding anything else is refused, nothing removed."""
    if out.exists() and not out.is_dir():
        raise SimlensError(f"{out}: exists and is not a folder; choose another --out")
    if out.exists() and any(out.iterdir()):
        record = out / record_name
        if not overwrite:
            raise SimlensError(f"{out} exists and is not empty; choose another --out, or pass --overwrite "
                               f"if it holds an earlier simlens {what}")
        try:
            written = json.loads(record.read_text(encoding="utf-8"))
            listed = [str(name) for name in written["files"]] if written.get("format") == record_format else None
        except (OSError, ValueError, TypeError, KeyError, AttributeError):
            listed = None
        if listed is None:
            raise SimlensError(f"{out}: holds no simlens {what} ({record_name} missing or unreadable); "
                               f"simlens replaces only its own output: choose another --out")
        ours = {confined(out, name, record).relative_to(out) for name in listed} | {Path(record_name)}
        foreign = sorted(str(p.relative_to(out)) for p in out.rglob("*")
                         if not p.is_dir() and p.relative_to(out) not in ours)
        if foreign:
            raise SimlensError(f"{out}: holds files simlens did not write there ({', '.join(foreign[:3])}"
                               f"{' ...' if len(foreign) > 3 else ''}); nothing was removed: move them away "
                               f"or choose another --out")
        for name in ours:
            (out / name).unlink(missing_ok=True)
    out.mkdir(parents=True, exist_ok=True)
    for sub in subfolders:
        (out / sub).mkdir(exist_ok=True)


def write_record(out: Path, record_name: str, record_format: str, files: list) -> None:
    """The record of the files a command wrote in ``out`` (the only ones ``--overwrite`` removes)."""
    from .atomic import atomic_path

    with atomic_path(out / record_name) as tmp:
        tmp.write_text(json.dumps({"format": record_format, "files": files}, indent=1) + "\n", encoding="utf-8")
