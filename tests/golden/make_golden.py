"""Record the golden runs: ``python tests/golden/make_golden.py`` writes ``tests/golden/golden.json``.

``python tests/golden/make_golden.py --diff`` instead reruns the runs and prints, per run, the
largest |new - recorded| / (1 + |recorded|) without writing anything.

The record holds, for every run of :data:`golden.runs.RUNS`, its estimates, standard errors,
covariance, variance decomposition and (where present) plug-in estimates, together with the
versions of the numerical libraries it ran under. ``tests/test_golden.py`` reruns the same
calls and compares them to 1e-10. Regenerate the record only before a refactoring (never to
make a changed number pass) and say so in the commit message.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import sys
import time
from pathlib import Path

os.environ.setdefault("OMP_NUM_THREADS", "1")
sys.path.insert(0, str(Path(__file__).resolve().parents[1]))  # the tests folder

from golden.runs import RUNS, library_versions, run  # noqa: E402

GOLDEN = Path(__file__).with_name("golden.json")


def diff() -> None:
    """Print each run's largest scaled difference from the record."""
    import numpy as np

    record = json.loads(GOLDEN.read_text())
    print(f"recorded under {record['versions']}; installed {library_versions()}")
    worst_all = 0.0
    for name in RUNS:
        new, old = run(name), record["runs"][name]
        worst = max(
            float(np.max(np.abs(np.subtract(new[k], v)) / (1.0 + np.abs(v)), initial=0.0))
            for k, v in old.items()
        )
        worst_all = max(worst_all, worst)
        print(f"{worst:9.2e}  {name}")
    print(f"{worst_all:9.2e}  largest over all runs (tolerance 1e-10)")


def main() -> None:
    """Run every golden run and write :data:`GOLDEN` (``--diff``: compare instead)."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--diff", action="store_true", help="compare with the record, write nothing")
    if parser.parse_args().diff:
        diff()
        return
    t0 = time.perf_counter()
    runs = {}
    for name in RUNS:
        t = time.perf_counter()
        runs[name] = run(name)
        print(f"{time.perf_counter() - t:6.2f} s  {name}")
    import orthoccp

    doc = {
        "about": "behaviour-preservation record for refactoring (issue 23); see tests/test_golden.py",
        "versions": library_versions(),
        "python": platform.python_version(),
        "orthoccp": orthoccp.__version__,
        "runs": runs,
    }
    GOLDEN.write_text(json.dumps(doc, indent=1) + "\n")
    print(f"{len(runs)} runs in {time.perf_counter() - t0:.1f} s -> {GOLDEN}")


if __name__ == "__main__":
    main()
