"""Write-then-rename, so no half-written file ever carries a final name."""

from __future__ import annotations

import os
from contextlib import contextmanager
from pathlib import Path


@contextmanager
def atomic_path(final: Path):
    """Yield a temporary path beside ``final``; rename it to ``final`` only if the block succeeds."""
    final = Path(final)
    tmp = final.with_name(f".{final.name}.tmp-{os.getpid()}")
    try:
        yield tmp
        os.replace(tmp, final)
    finally:
        if tmp.exists():
            tmp.unlink()
