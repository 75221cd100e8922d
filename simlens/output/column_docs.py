"""Write the column reference of the docs: ``python -m simlens.output.column_docs [PATH]``
(default ``docs/truth_columns.md``; tests/test_output.py checks that it is up to date)."""

from __future__ import annotations

import sys
from pathlib import Path

from .truth import column_reference

if __name__ == "__main__":
    target = Path(sys.argv[1]) if len(sys.argv) > 1 else Path(__file__).parents[2] / "docs" / "truth_columns.md"
    target.parent.mkdir(parents=True, exist_ok=True)
    target.write_text(column_reference(), encoding="utf-8")
    print(f"wrote {target}")
