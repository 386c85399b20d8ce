"""Pinned budgets: budget.json of every demo case and of the golden cases, minus timings.

``python tests/golden/pin.py`` rewrites the pinned files from the current code. Run it only
when a change of the numbers is intended, and say in the commit message why they changed;
``tests/test_golden.py`` compares every run with these files.
"""

from __future__ import annotations

import json
import sys
from pathlib import Path

REPO = Path(__file__).resolve().parents[2]
PINNED = Path(__file__).resolve().parent / "pinned"
# Keys that hold clock readings, file locations or how the work was split, not results.
VOLATILE = {
    ("run", "elapsed_seconds"),
    ("run", "cost"),
    ("run", "timestamp"),
    ("run", "chunk_rows"),
    ("run", "stages"),
    ("run", "work"),
    ("run", "prediction"),
    ("case", "path"),
    ("fit", "counts_file"),
}


def cases() -> list[Path]:
    """The demo cases and the golden cases, in a fixed order."""
    demo = sorted((REPO / "cases").glob("*.toml"))
    golden = sorted((Path(__file__).resolve().parent / "cases").glob("*.toml"))
    return demo + golden


def stable_part(budget: dict) -> dict:
    """budget.json without the volatile keys."""
    data = json.loads(json.dumps(budget))
    for section, key in VOLATILE:
        if isinstance(data.get(section), dict):
            data[section].pop(key, None)
    return data


def pinned_path(case_path: Path) -> Path:
    return PINNED / f"{case_path.stem}.json"


def main() -> None:
    sys.path.insert(0, str(REPO))
    from errbudget import load_case, run_case

    PINNED.mkdir(exist_ok=True)
    for path in cases():
        budget = run_case(load_case(path)).to_dict()
        text = json.dumps(stable_part(budget), indent=1, sort_keys=True) + "\n"
        pinned_path(path).write_text(text, encoding="utf-8")
        print(f"pinned {path.name}")


if __name__ == "__main__":
    main()
