"""Regenerate the committed demo scenario in this folder ("full" size, default seed).

Run from anywhere:

    python demo_data/make_demo.py

It rewrites project.toml, occurrences.csv, start_points.csv, surveys.csv and
layers/*.tif next to this script.  The scenario is invented; see README.md.
"""

from __future__ import annotations

import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
if str(HERE.parent) not in sys.path:  # run from a source checkout without installing
    sys.path.insert(0, str(HERE.parent))

from screener.demo import DEFAULT_SEED, write_demo_scenario  # noqa: E402


def main() -> int:
    start = time.perf_counter()
    project = write_demo_scenario(HERE, seed=DEFAULT_SEED, size="full")
    print(f"wrote {project} and its data in {time.perf_counter() - start:.2f} s")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
