"""Reduced models on pipeline data: error ratio, interval coverage and model choice over seeds.

Every experiment runs the real pipeline: ``make_plan`` -> ``simulate`` -> ``analyze`` on a
simulated two-qubit device (3% symmetric readout flips, 1% preparation flips per qubit), then
fits the reduced models of :mod:`robusttomo.models` to the decays ``analyze`` produced.

Truths (invented values):

* inside: the error generator ``h_ZZ = 0.02, h_IX = 0.01`` (a ZZ over-rotation of 0.04 rad
  and an IX rotation of 0.02 rad) plus ``s_XI = 0.004, s_IZ = 0.003, s_ZZ = 0.002``; Hamiltonian
  and Pauli-stochastic terms only, so "coherent+stochastic" holds the truth.
* outside: the same plus one correlated jump ``L = sqrt(g/2) (XI + IX)``, ``g = 0.01``, whose
  dissipator is ``g/2 (S_XI + S_IX + C_{XI,IX})``: the Pauli-correlation term ``C`` lies outside
  the reduced model ("A taxonomy of small Markovian errors", PRX Quantum 3, 020335 (2022)).

Reported per truth: the Frobenius error of the unital block of the unconstrained linear
estimate, the full CPTP fit (as wrapped for the comparison, and as re-anchored by
``analyze``) and "coherent+stochastic", and their ratios; the coverage of the reduced model's
95% intervals (Wald and bootstrap; parameters and the average gate fidelity); the model chosen
by AIC on all the data, by ``analyze`` (held-out sequences), and by the held-out rule without
the likelihood-ratio guard (the rule before that guard; see docs/method-models.md).

Usage::

    python benchmarks/study_models.py --repeats 20 --jobs 2 [--json out.json]
"""

from __future__ import annotations

import os

for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ[_var] = "1"  # threaded BLAS is far slower on the shared machine (docs/baselines.md)

import argparse  # noqa: E402
import json  # noqa: E402
import time  # noqa: E402
from concurrent.futures import ProcessPoolExecutor  # noqa: E402

import numpy as np  # noqa: E402
import scipy.linalg  # noqa: E402
import scipy.stats  # noqa: E402

HAMILTONIAN = {"ZZ": 0.02, "IX": 0.01}  # invented
STOCHASTIC = {"XI": 0.004, "IZ": 0.003, "ZZ": 0.002}  # invented
CORRELATED_RATE = 0.01  # invented: rate g of the jump sqrt(g/2) (XI + IX)
LENGTHS = (1, 2, 3, 4, 8, 16)  # the package's default two-qubit lengths
SHOTS = 100


def split_sequences(total: int) -> list[int]:
    """Sequences per default length summing to ``total``, five times as many at lengths <= 3
    (the proportions of the default two-qubit plan, 500/100)."""
    w = np.array([5.0 if m <= 3 else 1.0 for m in LENGTHS])
    raw = total * w / w.sum()
    out = np.floor(raw).astype(int)
    for i in np.argsort(-(raw - out))[: total - int(out.sum())]:
        out[i] += 1
    return [int(v) for v in out]


def _pauli(label: str) -> np.ndarray:
    mats = {"I": np.eye(2), "X": np.array([[0, 1], [1, 0]]), "Y": np.array([[0, -1j], [1j, 0]]),
            "Z": np.diag([1.0, -1.0])}
    out = np.ones((1, 1), dtype=complex)
    for c in label:
        out = np.kron(out, mats[c])
    return out


def truth_channel(kind: str, background: float = 0.0):
    """The device error: "inside" (H + S only, optionally ``background`` on every stochastic
    rate) or "outside" (plus the correlated jump)."""
    from robusttomo import _pauli as rp
    from robusttomo.channels import Channel
    from robusttomo.generators import generator_matrix

    labels = rp.pauli_labels(2)[1:]
    sto = {p: STOCHASTIC.get(p, 0.0) + background for p in labels}
    gen = generator_matrix(2, HAMILTONIAN, sto)
    if kind == "outside":
        # PTM of the dissipator D[L] rho = L rho L^+ - {L^+ L, rho}/2, L = sqrt(g/2)(XI + IX)
        jump = np.sqrt(CORRELATED_RATE / 2) * (_pauli("XI") + _pauli("IX"))
        paulis = [_pauli(p) for p in rp.pauli_labels(2)]
        ld = jump.conj().T @ jump
        dis = np.array([[np.trace(pi @ (jump @ pj @ jump.conj().T - 0.5 * (ld @ pj + pj @ ld))).real / 4
                         for pj in paulis] for pi in paulis])
        gen = gen + dis
    return Channel.from_ptm(scipy.linalg.expm(gen)), sto


def _device(truth):
    import robusttomo as rt

    return rt.Device.build(2, error=truth, prep_flip=[0.01, 0.01], readout=[(0.03, 0.03), (0.03, 0.03)])


def _fits(obs, full_channel):
    from robusttomo import models as mdl

    return [mdl.ModelFit.from_channel(mdl.FULL, full_channel, 225, obs), mdl.fit_generator_model(obs),
            mdl.fit_pauli_model(obs), mdl.fit_coherent_model(obs)]


def _old_heldout_choice(comp) -> str:
    """The one-standard-error rule alone (no likelihood-ratio guard)."""
    close = [s for s in comp.scores if s.heldout_gap <= s.heldout_gap_se]
    return min(close, key=lambda s: (s.n_parameters, s.heldout_chi2)).name


def experiment(task: dict) -> dict:
    """One simulated experiment through the pipeline; returns its measured figures."""
    import robusttomo as rt
    from robusttomo import assess, metrics
    from robusttomo import models as mdl
    from robusttomo import reconstruct as rc
    from robusttomo.channels import Channel
    from robusttomo.estimate import compute_correlations
    from robusttomo.fit import fit_decays

    t0, c0 = time.perf_counter(), time.process_time()
    truth, sto = truth_channel(task["truth"], task.get("background", 0.0))
    tb = truth.unital_block
    plan = rt.make_plan(n_qubits=2, lengths=list(LENGTHS), sequences=split_sequences(task["sequences"]),
                        shots=SHOTS, seed=task["seed"])
    counts = rt.simulate(plan, _device(truth), seed=task["seed"] + 1, exact=task["exact"])
    boot = task["bootstrap"]
    rec = rt.analyze(plan, counts, bootstrap=boot, seed=task["seed"] + 2, ranges=False, diamond=False)
    obs = rec.decays.observations()
    by_name = {m.name: m for m in rec.models}
    full_ch = Channel.from_ptm(by_name[mdl.FULL].ptm)
    fits = _fits(obs, full_ch)
    red = fits[1]
    out = {**task, "chosen_analyze": rec.chosen_model, "chosen_aic": mdl.compare_models(fits).chosen,
           "err_linear": float(np.linalg.norm(rec.linear_unital_block - tb)),
           "err_cptp": float(np.linalg.norm(full_ch.unital_block - tb)),
           "err_anchored": float(np.linalg.norm(rec.error_channel.unital_block - tb)),
           "err_reduced": float(np.linalg.norm(red.unital_block - tb)),
           "reduced_chi2": red.chi2, "reduced_dof": red.dof}
    if task.get("heldout", True):
        # the split analyze uses (every other sequence), to record the rule without the guard
        corr = compute_correlations(plan, counts)
        train, test = (fit_decays(assess._subset(corr, k), bootstrap=0).observations() for k in (0, 1))
        comp = mdl.compare_models(_fits(train, rc.fit_cptp(train).channel), heldout=test)
        out["chosen_heldout"] = comp.chosen
        out["chosen_heldout_unguarded"] = _old_heldout_choice(comp)
    if task["truth"] == "inside":
        params = {f"H:{p}": HAMILTONIAN.get(p, 0.0) for p in (k[2:] for k in red.parameters if k[0] == "H")}
        params.update({f"S:{p}": v for p, v in sto.items()})
        agf_true = metrics.average_gate_fidelity(truth)
        wald = red.intervals()
        simultaneous = red.intervals(level=1 - 0.05 / len(params))
        fw = red.fidelity_intervals()
        out.update({"agf_true": agf_true, "wald_inside": int(sum(wald.contains(params).values())),
                    "n_parameters": len(params),
                    "simultaneous_all": bool(all(simultaneous.contains(params).values())),
                    "agf_wald": bool(fw.lower[0] <= agf_true <= fw.upper[0]),
                    "agf_wald_halfwidth": float((fw.upper[0] - fw.lower[0]) / 2),
                    "agf_analyze": bool(rec.figures.average_gate_fidelity.contains(agf_true))})
        if boot:
            bp = mdl.intervals_from_replicates(red, obs)
            bf = mdl.intervals_from_replicates(red, obs, figures=True)
            out.update({"boot_inside": int(sum(bp.contains(params).values())),
                        "agf_boot": bool(bf.lower[0] <= agf_true <= bf.upper[0])})
    out["wall_s"] = time.perf_counter() - t0
    out["cpu_s"] = time.process_time() - c0
    return out


def _rate(rows: list[dict], key: str, value: str) -> str:
    return f"{sum(r[key] == value for r in rows)}/{len(rows)}"


def _ratio_summary(rows: list[dict], num: str) -> str:
    r = np.array([x[num] / x["err_reduced"] for x in rows])
    rms = np.sqrt(np.mean([x[num] ** 2 for x in rows]) / np.mean([x["err_reduced"] ** 2 for x in rows]))
    return f"{np.median(r):.2f} [{r.min():.2f}, {r.max():.2f}], RMS ratio {rms:.2f}"


def summarize(rows: list[dict]) -> str:
    """Markdown of the study's results."""
    lines: list[str] = []
    groups = {}
    for r in rows:
        groups.setdefault((r["part"], r["truth"], r["sequences"], r["exact"], r.get("background", 0.0)), []).append(r)
    for (part, truth, n, exact, bg), g in groups.items():
        data = "exact probabilities" if exact else f"{SHOTS} shots per sequence"
        head = f"* **{part}**, truth {truth}" + (f" + background s = {bg:g} on every Pauli" if bg else "")
        lines.append(f"{head}, {n} sequences, {data}, {len(g)} repeats:")
        lines.append(f"  - error ratio full CPTP / reduced: median [min, max] {_ratio_summary(g, 'err_cptp')}")
        lines.append(f"  - error ratio anchored CPTP (analyze) / reduced: {_ratio_summary(g, 'err_anchored')}")
        lines.append(f"  - error ratio unconstrained linear / reduced: {_ratio_summary(g, 'err_linear')}")
        lines.append(f"  - median errors: linear {np.median([x['err_linear'] for x in g]):.4f}, CPTP "
                     f"{np.median([x['err_cptp'] for x in g]):.4f}, reduced {np.median([x['err_reduced'] for x in g]):.4f}")
        if part == "sweep":
            continue
        names = ("coherent+stochastic", "full", "pauli", "coherent")
        for key, what in (("chosen_aic", "AIC on all data"), ("chosen_analyze", "analyze (held-out)"),
                          ("chosen_heldout_unguarded", "held-out without the likelihood-ratio guard")):
            if key in g[0]:
                lines.append(f"  - chosen by {what}: " + ", ".join(f"{m} {_rate(g, key, m)}" for m in names
                                                                   if any(x[key] == m for x in g)))
        chi = np.array([x["reduced_chi2"] / x["reduced_dof"] for x in g])
        lines.append(f"  - reduced model chi2/dof: median {np.median(chi):.3f} [{chi.min():.3f}, {chi.max():.3f}]")
        if truth == "inside":
            k = g[0]["n_parameters"]
            w = sum(x["wald_inside"] for x in g)
            lines.append(f"  - Wald 95% parameter intervals containing the truth: {w}/{k * len(g)} "
                         f"({w / (k * len(g)):.3f}); fewest in one experiment {min(x['wald_inside'] for x in g)}/{k}")
            lines.append(f"  - all {k} simultaneous (Bonferroni, level 1 - 0.05/{k}) Wald intervals contain the "
                         f"truth: {sum(x['simultaneous_all'] for x in g)}/{len(g)}")
            if "boot_inside" in g[0]:
                b = sum(x["boot_inside"] for x in g)
                lines.append(f"  - bootstrap 95% parameter intervals containing the truth: {b}/{k * len(g)} "
                             f"({b / (k * len(g)):.3f}); fewest in one experiment {min(x['boot_inside'] for x in g)}/{k}")
                lines.append(f"  - average gate fidelity, bootstrap interval of the reduced model contains the truth: "
                             f"{sum(x['agf_boot'] for x in g)}/{len(g)}")
            lines.append(f"  - average gate fidelity, Wald interval of the reduced model contains the truth: "
                         f"{sum(x['agf_wald'] for x in g)}/{len(g)} (median half-width "
                         f"{np.median([x['agf_wald_halfwidth'] for x in g]):.2e}); analyze's interval: "
                         f"{sum(x['agf_analyze'] for x in g)}/{len(g)}")
        lines.append(f"  - time per experiment: median {np.median([x['wall_s'] for x in g]):.1f} s wall, "
                     f"{np.median([x['cpu_s'] for x in g]):.1f} s CPU")
    return "\n".join(lines)


def tasks(repeats: int, *, bootstrap: int, sequences: int, plentiful: int, sweep_repeats: int) -> list[dict]:
    """Every experiment of the study (independent seeds)."""
    out = []
    seed = 10_000
    for r in range(repeats):
        out.append(dict(part="main", truth="inside", sequences=sequences, exact=False, bootstrap=bootstrap, seed=seed + 10 * r))
        out.append(dict(part="main", truth="outside", sequences=sequences, exact=False, bootstrap=0, seed=seed + 10 * r + 5))
        out.append(dict(part="plentiful", truth="outside", sequences=plentiful, exact=True, bootstrap=0,
                        seed=seed + 10 * r + 7))
    for r in range(sweep_repeats):
        for bg in (1e-3, 3e-3, 1e-2):
            out.append(dict(part="sweep", truth="inside", background=bg, sequences=sequences, exact=False,
                            bootstrap=0, heldout=False, seed=50_000 + 10 * r + int(bg * 1e4)))
        for n in (3 * sequences, 10 * sequences):
            out.append(dict(part="sweep", truth="inside", sequences=n, exact=False, bootstrap=0, heldout=False,
                            seed=60_000 + 10 * r + n // sequences))
    return out


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeats", type=int, default=20, help="independent seeds per truth (default 20)")
    ap.add_argument("--bootstrap", type=int, default=50, help="bootstrap replicates, inside truth (default 50)")
    ap.add_argument("--sequences", type=int, default=10_000, help="sequences per experiment (default 10^4)")
    ap.add_argument("--plentiful", type=int, default=30_000,
                    help="sequences of the plentiful outside-truth experiments, exact probabilities (default 3*10^4)")
    ap.add_argument("--sweep-repeats", type=int, default=5, help="repeats of each ratio-sweep point (default 5; 0 skips)")
    ap.add_argument("--jobs", type=int, default=1, help="worker processes (default 1)")
    ap.add_argument("--json", default=None, help="also write the per-experiment rows to this JSON file")
    args = ap.parse_args(argv)
    if args.repeats < 1 or args.jobs < 1 or args.sequences < 100 or args.bootstrap < 0 or args.sweep_repeats < 0:
        ap.error("--repeats, --jobs >= 1, --sequences >= 100, --bootstrap and --sweep-repeats >= 0")
    work = tasks(args.repeats, bootstrap=args.bootstrap, sequences=args.sequences, plentiful=args.plentiful,
                 sweep_repeats=args.sweep_repeats)
    t0, c0 = time.perf_counter(), time.process_time()
    if args.jobs == 1:
        rows = [experiment(t) for t in work]
    else:
        with ProcessPoolExecutor(max_workers=args.jobs) as ex:
            rows = list(ex.map(experiment, work))
    wall = time.perf_counter() - t0
    print(summarize(rows))
    print(f"\n{len(rows)} experiments, {wall:.0f} s wall, {sum(r['cpu_s'] for r in rows):.0f} s CPU in the "
          f"experiments ({time.process_time() - c0:.0f} s in the parent), jobs = {args.jobs}")
    if args.json:
        from robusttomo import _io

        with _io.atomic_path(args.json, force=False) as tmp:  # never overwrites an existing file
            with open(tmp, "w") as fh:
                json.dump(rows, fh, indent=1, default=float)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
