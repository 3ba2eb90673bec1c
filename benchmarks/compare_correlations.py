"""Correlations of this checkout against another version of the package, in one process.

Timing two versions in separate runs on a shared machine mixes the change with the load; this
script imports the other version's ``estimate`` module beside this one and times both on the
same plans and counts, alternately, best of several calls, with the numpy floor of
``benchmarks/study_speed.py`` in the same run.  It also checks that both give the same values.

Run from the repository root, with the other version unpacked somewhere::

    git archive <commit> robusttomo | tar -x -C /tmp/other
    OPENBLAS_NUM_THREADS=1 python benchmarks/compare_correlations.py --other /tmp/other
"""

from __future__ import annotations

import argparse
import importlib.util
import os
import sys
from pathlib import Path

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "benchmarks"))

import numpy as np  # noqa: E402

SIZES = ((1, 100), (1, 1000), (1, 10000), (2, 100), (2, 1000), (2, 10000), (3, 100), (3, 1000))


def _load_other(directory: Path):
    path = directory / "robusttomo" / "estimate.py"
    if not path.is_file():
        raise SystemExit(f"compare_correlations: {path} not found; unpack the other version with "
                         "'git archive <commit> robusttomo | tar -x -C DIR'")
    spec = importlib.util.spec_from_file_location("other_estimate", path)
    mod = importlib.util.module_from_spec(spec)  # type: ignore[arg-type]
    sys.modules["other_estimate"] = mod
    spec.loader.exec_module(mod)  # type: ignore[union-attr]
    return mod


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--other", type=Path, required=True, help="directory holding the other version's robusttomo/")
    ap.add_argument("--rounds", type=int, default=7,
                    help="alternating rounds per size (best over all of them); more rounds, less noise")
    args = ap.parse_args(argv)
    import robusttomo as rt
    import study_common as sc
    import study_speed as ss
    from robusttomo import estimate as this
    from robusttomo.plan import default_lengths

    other = _load_other(args.other)
    print("| qubits | sequences | other (ms) | this (ms) | other / this | floor (ms) | other / floor | this / floor "
          "| largest difference |")
    print("|---|---|---|---|---|---|---|---|---|")
    for n, total in SIZES:
        lengths = default_lengths(n)
        plan = rt.make_plan(n_qubits=n, lengths=lengths, sequences=sc.split_sequences(total, lengths), seed=0)
        dev = rt.Device.build(n, error=sc.general_error(n), readout=[(0.02, 0.02)] * n)
        counts = rt.simulate(plan, dev, seed=1)
        probes = this.default_probes(n)
        a = this.compute_correlations(plan, counts, probes=probes)
        b = other.compute_correlations(plan, counts, probes=probes)
        diff = max(float(np.max(np.abs(x.values - y.values))) for x, y in zip(a.stats, b.stats))
        repeats = 3 if n == 3 else max(5, 3000 // total)
        t_this = t_other = float("inf")
        floor = float("inf")
        for _ in range(args.rounds):  # alternate, so that a change of load hits all three
            t_other = min(t_other, ss._best(lambda: other.compute_correlations(plan, counts, probes=probes), repeats))
            t_this = min(t_this, ss._best(lambda: this.compute_correlations(plan, counts, probes=probes), repeats))
            floor = min(floor, ss.floor_seconds(a)["total"])
        print(f"| {n} | {total} | {t_other * 1e3:.3f} | {t_this * 1e3:.3f} | {t_other / t_this:.2f} | "
              f"{floor * 1e3:.3f} | {t_other / floor:.2f} | {t_this / floor:.2f} | {diff:.1e} |", flush=True)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
