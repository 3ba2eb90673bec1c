"""Precision planner: run times, and predicted standard errors against repeated experiments.

Usage (repository root)::

    python benchmarks/bench_planner.py             # timings and the agreement study (about 2 min)
    python benchmarks/bench_planner.py --repeats 30 --skip-two-qubits    # small (about 40 s)

The agreement study uses the settings and seeds of ``tests/test_planner.py`` (so with the
default repeats its numbers are those the tests assert on) and prints, for every figure, the
observed spread over independent simulated experiments divided by the predicted standard
error.  Results are recorded in ``docs/benchmarks.md`` ("Precision planner").
"""

from __future__ import annotations

import os

# one BLAS thread per process (set before numpy loads): the planner's linear algebra is many
# small matrices, for which threads only add synchronization (see tests/conftest.py)
for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import argparse  # noqa: E402
import math  # noqa: E402
import time  # noqa: E402

import numpy as np  # noqa: E402

import robusttomo as rt  # noqa: E402
from robusttomo import _pauli  # noqa: E402
from robusttomo import channels as ch  # noqa: E402
from robusttomo import planner as pl  # noqa: E402
from robusttomo.estimate import compute_correlations  # noqa: E402
from robusttomo.fit import estimate_decays, fit_decays  # noqa: E402
from robusttomo.models import fit_coherent_model, fit_generator_model, fit_pauli_model  # noqa: E402
from robusttomo.plan import make_plan  # noqa: E402
from robusttomo.reconstruct import linear_estimate  # noqa: E402
from robusttomo.simulate import Device  # noqa: E402

COSTS = {"seconds_per_shot": 2e-4, "seconds_per_sequence": 0.05}


def _timed(fn):
    t = time.perf_counter()
    out = fn()
    return out, time.perf_counter() - t


def timings() -> None:
    print("## run times (one call each, wall clock)")
    for n, gate in ((1, None), (1, "h"), (2, None), (2, "cz")):
        dev = pl.assumed_device(n, average_error=0.02, readout_error=0.02, prep_error=0.01,
                                gate_error=0.01 if gate else None)
        plan = make_plan(n_qubits=n, seed=1, interleave=gate)
        _, t = _timed(lambda: pl.predict(plan, dev))
        print(f"predict, {n} qubit(s), default plan{' + ' + gate if gate else ''}: {t:.2f} s")
    for n, targets, gate in ((1, {"decay_fidelity": 1e-4}, None),
                             (1, {"decay_fidelity": 2e-4, "coherent+stochastic": 1e-3}, None),
                             (2, {"decay_fidelity": 2e-4}, None),
                             (2, {"average_gate_fidelity": 1e-3, "coherent+stochastic": 2e-3}, "cz")):
        dev = pl.assumed_device(n, average_error=0.015, readout_error=0.02, prep_error=0.01,
                                gate_error=0.008 if gate else None)
        prop, t = _timed(lambda: pl.choose_plan(n_qubits=n, device=dev, targets=targets, costs=COSTS,
                                                interleave=gate, level=0.95 if gate else None))
        print(f"choose_plan, {n} qubit(s), targets {targets}{', ' + gate if gate else ''}: {t:.1f} s "
              f"-> {sum(prop.sequences)} sequences x {prop.shots} shots, {prop.device_seconds / 3600:.3g} h")


def _sd(a) -> np.ndarray:
    return np.std(np.asarray(a), axis=0, ddof=1)


def _experiments(device, kw, reps, seed, *, interleave=None, models=None):
    n = device.n_qubits
    d = 2**n
    out = {"fid": [], "fid_nocv": [], "lam": [], "agf": [], "block": [], "classic": []}
    models = models or {}
    for name in models:
        out[name] = []
    for r in range(reps):
        plan = make_plan(n_qubits=n, seed=seed + r, interleave=interleave, **kw)
        counts = rt.simulate(plan, device, seed=seed + 10**6 + r)
        corr = compute_correlations(plan, counts)
        dec = fit_decays(corr, bootstrap=0)
        out["fid"].append(dec.average_gate_fidelity)
        out["fid_nocv"].append(fit_decays(corr, bootstrap=0, control_variate=False).average_gate_fidelity)
        out["lam"].append(dec.lambdas)
        obs = dec.observations()
        b = linear_estimate(obs)
        if interleave is not None:
            dint = estimate_decays(plan, counts, bootstrap=0, kind="interleaved")
            bg = _pauli.ptm_of_unitary(plan.interleave.unitary)[1:, 1:]
            b = linear_estimate(dint.observations()) @ np.linalg.inv(bg @ b @ bg.T)
            out["classic"].append((d - 1) * (1 - dint.identity_decay / dec.identity_decay) / d)
        out["agf"].append(((1 + np.trace(b)) / d + 1) / (d + 1))
        out["block"].append(b.reshape(-1))
        for name, (fit, start) in models.items():
            res = fit(obs) if start is None else fit(obs, start=start)
            out[name].append(list(res.parameters.values()))
    return {k: np.array(v) for k, v in out.items() if v}


def _report(label, pred, res, block_true, models=()):
    rows = []
    if "fid" in res:
        rows.append(("decay_fidelity", _sd(res["fid"]) / pred.stderr("decay_fidelity")))
        rows.append(("decay_fidelity without CV", _sd(res["fid_nocv"]) / pred.figure("decay_fidelity").stderr_without_cv))
        lam = _sd(res["lam"]) / pred.lambda_stderr
        rows.append(("lambdas: median over probes", np.median(lam)))
        rows.append(("lambdas: range", f"{lam.min():.2f} .. {lam.max():.2f}"))
        rows.append(("lambda of the identity probe", lam[0]))
    rows.append(("average_gate_fidelity", _sd(res["agf"]) / pred.stderr("average_gate_fidelity")))
    rms = math.sqrt(np.mean(np.sum((res["block"] - block_true.reshape(-1)) ** 2, axis=1)))
    rows.append(("unital_block (rms Frobenius error)", rms / pred.stderr("unital_block")))
    if len(res.get("classic", [])):
        rows.append(("classic_interleaved_error", _sd(res["classic"]) / pred.stderr("classic_interleaved_error")))
    for name in models:
        r = _sd(res[name]) / pred.model(name).stderr
        rows.append((f"{name}: median over parameters", np.median(r)))
        rows.append((f"{name}: range", f"{r.min():.2f} .. {r.max():.2f}"))
    print(f"### {label}")
    for k, v in rows:
        print(f"  {k:<40} {v if isinstance(v, str) else format(float(v), '.3f')}")


def agreement(reps1: int, reps2: int, two: bool) -> None:
    print("## observed spread / predicted standard error")
    dev = pl.assumed_device(1, average_error=0.02, readout_error=0.03, prep_error=0.01, coherent_fraction=0.2)
    kw = {"lengths": [1, 2, 3, 6, 12, 24], "sequences": [200, 400, 400, 100, 100, 100], "shots": 200}
    pred = pl.predict(make_plan(n_qubits=1, seed=0, **kw), dev)
    gen = pred.model("coherent+stochastic")
    res = _experiments(dev, kw, reps1, 1000,
                       models={"coherent+stochastic": (fit_generator_model, dict(zip(gen.labels, gen.values)))})
    _report(f"one qubit, depolarizing + rotation, {reps1} repeats", pred, res, dev.error.unital_block,
            ["coherent+stochastic"])
    for which, err, fit, start in (("pauli", ch.pauli_channel({"X": 0.01, "Y": 0.006, "Z": 0.02}), fit_pauli_model, False),
                                   ("coherent", ch.rotation("X", 0.05) @ ch.rotation("Z", 0.12), fit_coherent_model, True)):
        dev = Device.build(1, error=err, readout=[(0.03, 0.02)], prep_flip=[0.01])
        kw = {"lengths": [1, 2, 3, 6, 12], "sequences": [150, 300, 300, 80, 80], "shots": 300}
        pred = pl.predict(make_plan(n_qubits=1, seed=0, **kw), dev)
        mp = pred.model(which)
        res = _experiments(dev, kw, reps1, 3000, models={which: (fit, dict(zip(mp.labels, mp.values)) if start else None)})
        _report(f"one qubit, {which} error, {reps1} repeats", pred, res, dev.error.unital_block, [which])
    dev = pl.assumed_device(1, average_error=0.02, readout_error=0.03, prep_error=0.01, gate_error=0.01)
    kw = {"lengths": [1, 2, 3, 6, 12], "sequences": [200, 400, 400, 100, 100], "shots": 200}
    pred = pl.predict(make_plan(n_qubits=1, seed=0, interleave="h", **kw), dev)
    res = _experiments(dev, kw, reps1, 5000, interleave="h")
    _report(f"one qubit, isolated gate h, {reps1} repeats, interleaved", pred, res, dev.interleaved_error.unital_block)
    if two:
        dev = pl.assumed_device(2, average_error=0.08, readout_error=0.03, prep_error=0.01)
        kw = {"lengths": [1, 2, 3, 4, 8], "sequences": [400, 1000, 1000, 150, 150], "shots": 1000}
        pred = pl.predict(make_plan(n_qubits=2, seed=0, **kw), dev)
        gen = pred.model("coherent+stochastic")
        res = _experiments(dev, kw, reps2, 7000,
                           models={"coherent+stochastic": (fit_generator_model, dict(zip(gen.labels, gen.values)))})
        _report(f"two qubits, depolarizing + ZZ rotation, {reps2} repeats", pred, res, dev.error.unital_block,
                ["coherent+stochastic"])


def target_study() -> None:
    print("## proposed plan vs 30 % fewer sequences (decay_fidelity target 1e-4, 30 repeats each)")
    dev = pl.assumed_device(1, average_error=0.01, readout_error=0.03, prep_error=0.01)
    prop = pl.choose_plan(n_qubits=1, device=dev, targets={"decay_fidelity": 1e-4}, costs=COSTS,
                          lengths=[1, 2, 3, 4, 8, 16, 32, 64], seed=1)
    print(f"  proposal: lengths {prop.lengths}, sequences {prop.sequences}, shots {prop.shots}, "
          f"predicted stderr {prop.prediction.stderr('decay_fidelity'):.3g}")
    for label, seqs, seed in (("proposed", prop.sequences, 100),
                              ("30 % fewer", [math.ceil(0.7 * k) for k in prop.sequences], 500)):
        rep, est = [], []
        for r in range(30):
            plan = make_plan(n_qubits=1, lengths=list(prop.lengths), sequences=list(seqs), shots=prop.shots,
                             seed=seed + r)
            dec = estimate_decays(plan, rt.simulate(plan, dev, seed=seed + 1000 + r), bootstrap=0)
            rep.append(dec.average_gate_fidelity_stderr)
            est.append(dec.average_gate_fidelity)
        rep = np.array(rep)
        print(f"  {label:<11} reported stderr mean {rep.mean():.3g} (scatter {rep.std(ddof=1) / rep.mean():.1%}), "
              f"at or below target in {np.mean(rep <= 1e-4):.0%} of repeats; spread of the estimates "
              f"{np.std(est, ddof=1):.3g}")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeats", type=int, default=80, help="repeats of the one-qubit studies (default 80)")
    ap.add_argument("--repeats-two", type=int, default=40, help="repeats of the two-qubit study (default 40)")
    ap.add_argument("--skip-two-qubits", action="store_true")
    ap.add_argument("--skip-timings", action="store_true")
    args = ap.parse_args()
    if not args.skip_timings:
        timings()
    agreement(args.repeats, args.repeats_two, not args.skip_two_qubits)
    target_study()


if __name__ == "__main__":
    main()
