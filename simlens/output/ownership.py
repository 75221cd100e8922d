"""What simlens may touch in a folder: only files inside it that a record of its own names.

A run's manifest and an injection's record list the files simlens wrote.  Before anything listed
there is read, checked or deleted, :func:`confined` makes sure the entry is a plain relative path
that stays inside the folder (no ``..``, no absolute path, no symbolic link on the way): an edited
record can never make simlens open or remove a file elsewhere.
"""

from __future__ import annotations

from pathlib import Path

from ..errors import SimlensError

__all__ = ["confined", "shown"]


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
