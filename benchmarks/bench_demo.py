"""Benchmark: `robusttomo demo` (analysis and report of the shipped data) on the 2-core machine.

Target: under 90 s wall time for the whole command, interpreter start and imports included.
Run from the repository root:

    python benchmarks/bench_demo.py [--jobs 1 2]

Runs the installed command line in a fresh process per case (output in a temporary directory)
and prints the wall time, the time of each analysis stage (from the progress hook) and the
figures the demo found; exits non-zero if a case misses the target.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

TARGET_S = 90.0


def _stages(jobs: int, out: Path) -> dict[str, float]:
    """Stage times of one in-process run (progress hook), for the breakdown."""
    from robusttomo.demo import run_demo

    marks: dict[str, float] = {}
    start = time.perf_counter()

    def hook(stage: str, done: int, total: int) -> None:
        marks[stage] = time.perf_counter() - start

    run_demo(out, jobs=jobs, progress=hook, force=True)
    return marks


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--jobs", type=int, nargs="+", default=[1, 2])
    args = ap.parse_args(argv)
    print(f"cpu count: {os.cpu_count()}")
    failed = False
    for jobs in args.jobs:
        with tempfile.TemporaryDirectory() as tmp:
            out = Path(tmp) / "demo"
            t0 = time.perf_counter()
            res = subprocess.run([sys.executable, "-m", "robusttomo.cli", "demo", "-o", str(out), "--quiet",
                                  "--json", "--jobs", str(jobs)], capture_output=True, text=True)
            wall = time.perf_counter() - t0
            if res.returncode != 0:
                print(f"jobs={jobs}: demo failed ({res.returncode}): {res.stderr.strip()}")
                failed = True
                continue
            doc = json.loads(res.stdout)
            agf = json.loads((out / "summary.json").read_text())["average_gate_fidelity"]
            ok = wall < TARGET_S
            failed |= not ok
            print(f"jobs={jobs}: whole command {wall:.1f} s (analysis + report {doc['elapsed_seconds']:.1f} s), "
                  f"target {TARGET_S:.0f} s: {'met' if ok else 'MISSED'}; average gate fidelity "
                  f"{agf['value']:.5f} [{agf['ci95'][0]:.5f}, {agf['ci95'][1]:.5f}], true "
                  f"{doc['truth']['average_gate_fidelity']:.5f}")
            marks = _stages(jobs, Path(tmp) / "staged")
            parts = [f"{stage} until {t:.1f} s" for stage, t in marks.items()]
            print("   stages (in-process run): " + "; ".join(parts))
    return 1 if failed else 0


if __name__ == "__main__":
    sys.exit(main())
