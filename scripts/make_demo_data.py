#!/usr/bin/env python3
"""Produce the shipped demo data (robusttomo/demo_data/) with fixed seeds.

The scenario is INVENTED: a CZ gate on a fictional two-qubit test device.  Nothing here
describes a real machine.  The script writes

* device.json   - the invented device (named error parts, readout and preparation error),
* plan.h5       - an interleaved CZ plan that also holds the reference sequences,
* counts.h5     - the simulated counts (multinomial shots),
* scenario.json - description, seeds, analysis settings and the true figures of the gate error.

Run from the repository root:  python scripts/make_demo_data.py [--force]
"""

from __future__ import annotations

import argparse
import dataclasses
import json
import sys
from pathlib import Path

import numpy as np

from robusttomo import _io, metrics
from robusttomo._version import __version__
from robusttomo.counts import save_counts
from robusttomo.generators import rates_from_channel
from robusttomo.plan import make_plan, save_plan
from robusttomo.simulate import load_device, simulate

PLAN_SEED = 20_261_201
SIMULATION_SEED = 20_261_202
ANALYSIS_SEED = 20_261_203
#: Plan size and bootstrap count chosen so `robusttomo demo` stays well under 90 s on 2 cores
#: (measured; see docs/benchmarks.md, "Demo").
LENGTHS = [1, 2, 3, 4, 8, 16]
SEQUENCES = [1200, 1200, 600, 100, 100, 100]
SHOTS = 500
BOOTSTRAP = 20

DESCRIPTION = ("INVENTED scenario, not a real device: a CZ gate on a fictional two-qubit test device "
               "with a coherent ZZ over-rotation, amplitude damping on qubit 1, 2-3% readout error "
               "and a small preparation error.")

DEVICE = {
    "schema_version": 1,
    "kind": "robusttomo-device",
    "n_qubits": 2,
    "description": DESCRIPTION,
    # error after every random Clifford (the reference error L)
    "error_parts": [
        {"type": "depolarizing", "p": 0.992},
        {"type": "dephasing", "prob": 0.002, "qubits": [0]},
    ],
    # the CZ gate's own error L_G (applied after the ideal CZ)
    "interleaved_error_parts": [
        {"type": "rotation", "pauli": "ZZ", "angle": 0.08},
        {"type": "amplitude_damping", "gamma": 0.02, "qubits": [1]},
        {"type": "depolarizing", "p": 0.996},
    ],
    "readout": [[0.02, 0.03], [0.025, 0.028]],
    "prep_flip": [0.006, 0.01],
}


def _true_figures(error) -> dict[str, float]:
    gen = rates_from_channel(error)
    return {
        "average_gate_fidelity": metrics.average_gate_fidelity(error),
        "entanglement_fidelity": metrics.entanglement_fidelity(error),
        "diamond_distance": metrics.diamond_distance(error),
        "unitarity": metrics.unitarity(error),
        "coherent_share": metrics.coherent_share(error),
        "hamiltonian_ZZ": gen.hamiltonian["ZZ"],
    }


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--output-dir", default=str(Path(__file__).resolve().parents[1] / "robusttomo" / "demo_data"))
    ap.add_argument("--force", action="store_true", help="overwrite existing demo files")
    ap.add_argument("--sequences", default=",".join(map(str, SEQUENCES)),
                    help="sequences per length (a smaller set for tests; the shipped data use the default)")
    ap.add_argument("--bootstrap", type=int, default=BOOTSTRAP, help="bootstrap replicates the demo uses")
    args = ap.parse_args(argv)
    sequences = [int(t) for t in args.sequences.split(",")]
    out = Path(args.output_dir)
    out.mkdir(parents=True, exist_ok=True)
    names = ["device.json", "plan.h5", "counts.h5", "scenario.json"]
    if not args.force and any((out / n).exists() for n in names):
        print(f"{out}: demo files exist; pass --force to regenerate them", file=sys.stderr)
        return 2
    with _io.atomic_path(out / "device.json", force=args.force) as tmp:
        tmp.write_text(json.dumps(DEVICE, indent=1) + "\n", encoding="utf-8")
        device = load_device(tmp)  # validates the description exactly as users' files are validated

    plan = make_plan(n_qubits=2, lengths=LENGTHS, sequences=sequences, shots=SHOTS, seed=PLAN_SEED,
                     interleave="cz")
    counts = simulate(plan, device, seed=SIMULATION_SEED)
    counts = dataclasses.replace(counts, source=f"INVENTED demo scenario: {counts.source}")
    save_plan(plan, out / "plan.h5", force=args.force)
    save_counts(counts, out / "counts.h5", force=args.force)

    truth = _true_figures(device.interleaved_error)
    scenario = {
        "schema_version": 1,
        "kind": "robusttomo-demo-scenario",
        "invented": True,
        "description": DESCRIPTION,
        "generated_by": "scripts/make_demo_data.py",
        "package_version": __version__,
        "plan": {"lengths": LENGTHS, "sequences": sequences, "shots": SHOTS, "seed": PLAN_SEED,
                 "interleave": "cz", "fingerprint": plan.fingerprint},
        "simulation_seed": SIMULATION_SEED,
        "counts_fingerprint": counts.fingerprint,
        "analysis_seed": ANALYSIS_SEED,
        "bootstrap": args.bootstrap,
        "true_figures": truth,
        "true_error_ptm": np.asarray(device.interleaved_error.ptm).tolist(),
        "true_reference_error_ptm": np.asarray(device.error.ptm).tolist(),
    }
    with _io.atomic_path(out / "scenario.json", force=args.force) as tmp:
        tmp.write_text(json.dumps(scenario, indent=1) + "\n", encoding="utf-8")
    total = sum((out / n).stat().st_size for n in names)
    print(f"wrote {', '.join(names)} to {out} ({total / 1e6:.2f} MB); true average gate fidelity of the "
          f"invented CZ error: {truth['average_gate_fidelity']:.5f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
