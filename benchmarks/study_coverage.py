"""Do the intervals mean what they say: coverage, and bias under gate-dependent noise.

Run from the repository root (``run_all.py`` runs it as part of the study)::

    python benchmarks/study_coverage.py [--size smoke|small|full] [--jobs 2] [--sub coverage weights gate]
                                        [--raw DIR] [--qubits 1 2]

1. **Coverage.**  Many independent simulated experiments on one device (the gate error of
   :func:`study_common.general_error`, readout flips ``P(1|0) = 2%``, ``P(0|1) = 4%`` per
   qubit, preparation flip 1% per qubit), each a fresh default plan, shots and bootstrap
   (:func:`robusttomo.analyze`).  Counted: how often the 95% interval contains the true value
   of the average gate fidelity, of the diamond distance, and of the identity decay
   ``lambda_I`` (through ``figures.decay_fidelity``, a monotone function of ``lambda_I``, so
   its percentile interval covers ``F_avg`` exactly when the decay interval covers
   ``lambda_I``), and, when the diamond range is computed, how often
   ``figures.diamond_distance_range`` contains the true diamond distance.  Each coverage is
   given with its exact binomial (Clopper-Pearson) 95% interval.

   Each experiment also records the identity decay's diagnostics (its fit, sandwich standard
   error and bootstrap replicates' spread, :func:`_decay_diagnostics`), and the summary
   traces a miss (:func:`_diagnose`): the interval's width against the actual spread of the
   estimates, an interval of the right width centred on the estimate ("oracle"), the bias, and
   coverage among the narrower and the wider half of the intervals.

1b. **Weights.**  :func:`run_weights` refits the identity probe of the same experiments with
   their own estimated weights and with fixed weights, to measure how much variance the
   data-dependent weights of the decay fit add (the bootstrap holds them fixed).

   Long runs use a checkpoint directory (``--raw``, :func:`study_common.run_tasks`): every
   finished experiment is one JSON line, an interrupted run resumes, runs made elsewhere
   merge, and the tables say how many of the planned experiments finished.

2. **Gate-dependent noise.**  The device attaches an error to every native gate of each
   Clifford's compiled circuit (``Device.build(gate_errors=...)``), so the error of a
   Clifford depends on how it compiles.  The true per-Clifford error is
   ``E_C = N(C) o C^dagger`` with ``N(C)`` the noisy compiled circuit (rebuilt here from
   :func:`robusttomo.clifford.clifford_circuits`, independently of the simulator); its
   average over the whole Clifford group is compared with the reconstruction.  A control
   device with the same average error after every Clifford (gate-independent) shows what the
   diagnostics say when the model holds.
"""

from __future__ import annotations

import study_common as sc  # first: pins BLAS threads before numpy loads

import argparse  # noqa: E402
import sys  # noqa: E402

import numpy as np  # noqa: E402

CONFIG: dict[str, dict] = {
    "smoke": {
        "coverage": {"qubits": (1,), "experiments": {1: 3}, "bootstrap": {1: 10}, "ranges": {1: False},
                     "sequences": {1: 120}},
        "gate": {"qubits": (1,), "repeats": 1, "sequences": {1: 120}},
    },
    "small": {
        "coverage": {"qubits": (1, 2), "experiments": {1: 12, 2: 2}, "bootstrap": {1: 50, 2: 20},
                     "ranges": {1: True, 2: False}, "sequences": {1: None, 2: None}},
        "gate": {"qubits": (1, 2), "repeats": 2, "sequences": {1: None, 2: None}},
    },
    "full": {
        # two qubits: 200 experiments (the first 100 covered the diamond distance 100 of 100, an
        # exact 95% interval of 0.964-1 for the coverage: the next 100 narrow it); the weights and
        # remedy sub-studies keep the first 100 ("side_experiments")
        "coverage": {"qubits": (1, 2), "experiments": {1: 200, 2: 200}, "side_experiments": {1: 200, 2: 100},
                     "bootstrap": {1: 200, 2: 200}, "ranges": {1: True, 2: True}, "sequences": {1: None, 2: None}},
        "gate": {"qubits": (1, 2), "repeats": 10, "sequences": {1: 3000, 2: 7200}},
    },
}
COVERAGE_TARGET = (0.93, 0.97)


def coverage_device(n: int):
    """Gate-independent device of the coverage study."""
    import robusttomo as rt

    return rt.Device.build(n, error=sc.general_error(n), readout=[(0.02, 0.04)] * n, prep_flip=[0.01] * n)


def _plan(n: int, sequences: int | None, seed: int):
    import robusttomo as rt
    from robusttomo.plan import default_lengths

    if sequences is None:
        return rt.make_plan(n_qubits=n, seed=seed)
    lengths = default_lengths(n)
    return rt.make_plan(n_qubits=n, lengths=lengths, sequences=sc.split_sequences(sequences, lengths), seed=seed)


# ---- part 1: coverage ------------------------------------------------------------------------
def _coverage_task(t: dict) -> dict:
    import robusttomo as rt
    from robusttomo import metrics

    n, seed = t["n"], t["seed"]
    dev = coverage_device(n)
    err = dev.error
    true = {"agf": metrics.average_gate_fidelity(err), "dd": metrics.diamond_distance(err)}
    plan = _plan(n, t["sequences"], seed)
    counts = rt.simulate(plan, dev, seed=seed + 1)
    w = sc.timed(lambda: rt.analyze(plan, counts, bootstrap=t["bootstrap"], seed=seed + 2, models=False,
                                    ranges=t["ranges"], diamond=True))
    rec = w.value
    f = rec.figures
    out = {"n": n, "seed": seed, "seconds": w.wall, "cpu_seconds": w.cpu, "code": sc.code_version(),
           "warnings": list(rec.warnings)}
    for key, iv, truth in (("agf", f.average_gate_fidelity, true["agf"]), ("dd", f.diamond_distance, true["dd"]),
                           ("decay", f.decay_fidelity, true["agf"])):
        out[key] = {"value": iv.value, "low": iv.low, "high": iv.high, "covered": iv.contains(truth),
                    "error": iv.value - truth}
    span = f.diamond_distance_range
    out["dd_range"] = {"low": span.low, "high": span.high,
                       "covered": bool(span.low <= true["dd"] <= span.high) if np.isfinite(span.low) else None,
                       "high_is_bound": bool(span.high_is_bound)}
    out["diagnostics"] = _decay_diagnostics(rec.decays, err)
    return out


def _decay_diagnostics(dec, err) -> dict:
    """What a coverage miss is traced with: the identity decay, its errors and its bootstrap.

    ``lambda_I`` (fit), its sandwich standard error, the standard deviation, mean and 2.5/97.5
    percentiles of its bootstrap replicates, the true value, and the shared constant with its
    standard error.  A percentile interval that is too narrow shows as a bootstrap standard
    deviation below the spread of the estimates over experiments; a bias as a mean error
    that is not small against either.
    """
    k = dec.probes.labels.index("I") if "I" in dec.probes.labels else 0
    d2 = err.ptm.shape[0]
    out = {"lambda_I": float(dec.lambdas[k]), "lambda_I_stderr": float(dec.lambda_stderr[k]),
           "lambda_I_true": float((np.trace(err.ptm) - 1) / (d2 - 1)),
           "spam_constant": float(dec.spam_constant), "spam_constant_stderr": float(dec.spam_constant_stderr),
           "reduced_chi2": float(dec.chi2 / dec.dof) if dec.dof else float("nan"),
           "constant_spread_p": float(dec.constant_spread_p)}
    b = dec.bootstrap_lambdas
    if b is not None and len(b) > 1:
        col = np.asarray(b)[:, k]
        out.update({"boot_lambda_I_std": float(np.std(col, ddof=1)), "boot_lambda_I_mean": float(np.mean(col)),
                    "boot_lambda_I_q": [float(v) for v in np.percentile(col, [2.5, 97.5])]})
    return out


def _side_experiments(cfg: dict, n: int) -> int:
    """How many of the coverage experiments the weights and remedy sub-studies use."""
    return cfg.get("side_experiments", cfg["experiments"])[n]


def _coverage_tasks(cfg: dict) -> list[dict]:
    return [{"n": n, "seed": 2_000_000 + 100_000 * n + 10 * i, "bootstrap": cfg["bootstrap"][n],
             "ranges": cfg["ranges"][n], "sequences": cfg["sequences"][n]}
            for n in cfg["qubits"] for i in range(cfg["experiments"][n])]


def import_stored(size: str, store: dict, raw, *, label: str) -> int:
    """Put the coverage experiments stored in a results file back into the checkpoint in ``raw``.

    So that a partial study committed to ``docs/benchmarks-results.json`` can be resumed
    later from the repository alone: each stored experiment is matched to its task by qubit
    count and seed.  Returns the number imported (tasks already in the checkpoint are kept).
    """
    from pathlib import Path

    cfg = CONFIG[sc.check_size(size)]["coverage"]
    runs = store[size]["parts"]["coverage"]["results"]["coverage"]["runs"]
    by = {(r["n"], r["seed"]): sc.revive(r) for r in runs}
    ck = checkpoint_path(Path(raw), "coverage", size)
    have = sc.load_checkpoint(ck)
    k = 0
    for t in _coverage_tasks(cfg):
        key = sc.task_key(t)
        r = by.get((t["n"], t["seed"]))
        if key in have or r is None:
            continue
        sc._append_record(ck, key, t, {**r, "imported": label})
        k += 1
    return k


def checkpoint_path(raw: object, sub: str, size: str):
    """The checkpoint file of one sub-study (``coverage`` or ``gate``) in directory ``raw``."""
    from pathlib import Path

    return None if raw is None else Path(raw) / f"{sub}_{size}.jsonl"


def _run_some(fn, tasks: list[dict], *, jobs: int, checkpoint, run_missing: bool, qubits) -> list[dict]:
    """Run the tasks of ``qubits`` (all if None); of the others only what ``checkpoint`` holds."""
    mine = [t for t in tasks if qubits is None or t["n"] in qubits]
    rest = [t for t in tasks if not (qubits is None or t["n"] in qubits)]
    runs = sc.run_tasks(fn, mine, jobs=jobs, checkpoint=checkpoint, run_missing=run_missing)
    if rest and checkpoint is not None:
        runs += sc.run_tasks(fn, rest, checkpoint=checkpoint, run_missing=False)
    return sorted(runs, key=lambda r: (r["n"], r["seed"]))


def run_coverage(size: str, *, jobs: int = 1, raw=None, run_missing: bool = True, qubits=None) -> dict:
    """Coverage experiments; see the module docstring.

    ``raw``: directory of checkpoint files (resume, merge runs made elsewhere); ``qubits``:
    run new experiments only for these qubit counts; ``run_missing=False``: run nothing, just
    summarize what ``raw`` holds.  Rows report how many of the planned experiments finished.
    """
    from robusttomo import metrics

    cfg = CONFIG[sc.check_size(size)]["coverage"]
    tasks = _coverage_tasks(cfg)
    t = sc.timed(lambda: _run_some(_coverage_task, tasks, jobs=jobs, checkpoint=checkpoint_path(raw, "coverage", size),
                                   run_missing=run_missing, qubits=qubits))
    runs: list[dict] = t.value  # type: ignore[assignment]
    rows = []
    for n in cfg["qubits"]:
        err = coverage_device(n).error
        sel = [r for r in runs if r["n"] == n]
        if not sel:
            continue
        row: dict[str, object] = {"n": n, "experiments": len(sel), "planned": cfg["experiments"][n],
                                  "bootstrap": cfg["bootstrap"][n],
                                  "true_agf": metrics.average_gate_fidelity(err),
                                  "true_dd": metrics.diamond_distance(err),
                                  "mean_seconds": sc.mean([r["seconds"] for r in sel]),
                                  "mean_cpu_seconds": sc.mean([r.get("cpu_seconds", float("nan")) for r in sel]),
                                  "codes": sorted({str(r.get("code", "unknown")) for r in sel}),
                                  "finished_runs": len(sel),
                                  "runs_with_warnings": sum(1 for r in sel if r["warnings"])}
        for key in ("agf", "dd", "decay", "dd_range"):
            cov = [r[key]["covered"] for r in sel if r[key]["covered"] is not None]
            hits = int(sum(cov))
            lo, hi = sc.clopper_pearson(hits, len(cov))
            entry: dict[str, object] = {"hits": hits, "trials": len(cov),
                                        "coverage": hits / len(cov) if cov else float("nan"),
                                        "coverage_ci": [lo, hi],
                                        "mean_width": sc.mean([r[key]["high"] - r[key]["low"] for r in sel])}
            if key != "dd_range":
                errs = [r[key]["error"] for r in sel]
                entry["bias"] = sc.mean(errs)
                entry["bias_stderr"] = float(np.std(errs, ddof=1) / np.sqrt(len(errs))) if len(errs) > 1 else float("nan")
                entry["rms_error"] = sc.rms(errs)
                # interval miss side: below (interval entirely under the truth) or above
                entry["missed_low"] = sum(1 for r in sel if r[key]["high"] < r[key]["value"] - r[key]["error"])
                entry["missed_high"] = sum(1 for r in sel if r[key]["low"] > r[key]["value"] - r[key]["error"])
            row[key] = entry
        row["diagnosis"] = _diagnose(sel)
        rows.append(row)
    targets = []
    for row in rows:
        for key, label in (("agf", "average gate fidelity"), ("dd", "diamond distance"), ("decay", "identity decay")):
            c = row[key]["coverage"]  # type: ignore[index]
            part = "" if row["experiments"] >= row["planned"] else \
                f" (partial: {row['experiments']} of {row['planned']} experiments)"
            targets.append({"n": row["n"], "target": f"coverage of {label} in [93%, 97%]{part}", "value": c,
                            "met": bool(COVERAGE_TARGET[0] <= c <= COVERAGE_TARGET[1])})
    return {"config": _cfg_json(cfg), "rows": rows, "targets": targets, "runs": runs, "wall_seconds": t.wall}


def _diagnose(sel: list[dict]) -> dict:
    """Why an interval misses: its width against the actual spread, its centre, its tails.

    Per quantity: ``sd`` of the estimates over experiments (the spread an interval must
    match), ``width_ratio`` = mean width / ``(2 * 1.96 * sd)`` (1 for a normal interval of the
    right width), ``oracle_coverage`` = share of experiments within ``1.96 sd`` of the truth
    (what an interval of the right width centred on the estimate would cover: below 95% means
    bias or heavy tails, not width), ``coverage_narrow_half`` / ``coverage_wide_half`` =
    coverage among the experiments whose interval is narrower / wider than the median
    (a bootstrap whose width varies by chance misses more where it came out narrow), and the
    mean upper and lower arms ``high - value`` and ``value - low`` (asymmetry).  For the
    identity decay also the mean bootstrap standard deviation of ``lambda_I``, the mean sandwich
    standard error of the fit, and the spread of ``lambda_I`` over experiments.
    """
    out: dict[str, object] = {}
    for key in ("agf", "dd", "decay"):
        err = np.array([r[key]["error"] for r in sel], dtype=float)
        width = np.array([r[key]["high"] - r[key]["low"] for r in sel], dtype=float)
        cov = np.array([bool(r[key]["covered"]) for r in sel])
        if err.size < 3:
            continue
        sd = float(np.std(err, ddof=1))
        narrow = width <= np.median(width)
        out[key] = {
            "sd": sd, "width_ratio": float(np.mean(width) / (2 * 1.96 * sd)) if sd > 0 else float("nan"),
            "oracle_coverage": float(np.mean(np.abs(err) <= 1.96 * sd)),
            "coverage_narrow_half": float(np.mean(cov[narrow])), "coverage_wide_half": float(np.mean(cov[~narrow])),
            "upper_arm": sc.mean([r[key]["high"] - r[key]["value"] for r in sel]),
            "lower_arm": sc.mean([r[key]["value"] - r[key]["low"] for r in sel]),
            "bias_over_sd": float(np.mean(err) / sd) if sd > 0 else float("nan"),
        }
    dg = [r["diagnostics"] for r in sel if "diagnostics" in r]
    if len(dg) >= 3:
        lam = np.array([x["lambda_I"] for x in dg], dtype=float)
        boot = np.array([x.get("boot_lambda_I_std", float("nan")) for x in dg], dtype=float)
        out["lambda_I"] = {
            "true": dg[0]["lambda_I_true"], "mean": float(np.mean(lam)), "sd_over_experiments": float(np.std(lam, ddof=1)),
            "mean_bootstrap_sd": sc.mean(boot), "mean_sandwich_se": sc.mean([x["lambda_I_stderr"] for x in dg]),
            "normal_coverage_bootstrap_sd": float(np.mean(np.abs(lam - dg[0]["lambda_I_true"]) <= 1.96 * boot)),
            "mean_bootstrap_shift": sc.mean([x.get("boot_lambda_I_mean", float("nan")) - x["lambda_I"] for x in dg]),
            "mean_reduced_chi2": sc.mean([x["reduced_chi2"] for x in dg]),
        }
    return out


# ---- part 1b: why the fidelity interval misses (weights estimated from the data) --------------
def _weights_task(t: dict) -> dict:
    """The identity probe's per-length means and standard errors of one coverage experiment.

    Same plan and shots as the coverage experiment of this seed (so the same point estimate);
    no bootstrap, no ranges.
    """
    import robusttomo as rt

    n, seed = t["n"], t["seed"]
    dev = coverage_device(n)
    plan = _plan(n, t["sequences"], seed)
    w = sc.timed(lambda: rt.analyze(plan, rt.simulate(plan, dev, seed=seed + 1), bootstrap=0, models=False,
                                    ranges=False, diamond=False))
    dec = w.value.decays
    k = dec.probes.labels.index("I") if "I" in dec.probes.labels else 0
    return {"n": n, "seed": seed, "cpu_seconds": w.cpu, "code": sc.code_version(), "lengths": list(dec.lengths),
            "means": [float(v) for v in dec.means[k]], "stderr": [float(v) for v in dec.stderr[k]],
            "lambda_I": float(dec.lambdas[k])}


def _identity_fit(lengths: np.ndarray, y: np.ndarray, s: np.ndarray) -> float:
    """``lambda`` of the weighted least-squares fit of ``y_1 = c``, ``y_m = c lambda**(m-1)``.

    A fit of the identity probe alone (the package fits every probe with one shared ``c``):
    used only to compare the same estimator with estimated and with fixed weights.
    """
    import scipy.optimize

    s = np.maximum(s, 1e-15)  # a length whose values all agree (tiny samples): as the package's fit does

    def resid(x):
        return (y - x[0] * x[1] ** (lengths - 1)) / s

    sol = scipy.optimize.least_squares(resid, [y[0], 0.99], bounds=([-np.inf, -1.0], [np.inf, 1.0]))
    return float(sol.x[1])


def run_weights(size: str, *, jobs: int = 1, raw=None, run_missing: bool = True, qubits=None) -> dict:
    """Do estimated weights explain the misses?  Identity-only fits with own and with fixed weights.

    For every coverage experiment (same seeds, so the same data and the same point estimate),
    the identity probe's per-length means ``y_m`` and standard errors ``s_m`` are refitted
    (:func:`_identity_fit`) twice: with the experiment's own ``s_m`` (the weights every fit
    estimates from its data) and with ``s_m`` fixed at their mean over experiments (weights
    that do not depend on the data, which is what the bootstrap replicates and the sandwich
    formula take them to be).  If the spread of the first exceeds that of the second, the
    data-dependent weights add variance the percentile bootstrap does not see.
    """
    cfg = CONFIG[sc.check_size(size)]["coverage"]
    tasks = [{"n": n, "seed": 2_000_000 + 100_000 * n + 10 * i, "sequences": cfg["sequences"][n], "kind": "weights"}
             for n in cfg["qubits"] for i in range(_side_experiments(cfg, n))]
    t = sc.timed(lambda: _run_some(_weights_task, tasks, jobs=jobs, checkpoint=checkpoint_path(raw, "weights", size),
                                   run_missing=run_missing, qubits=qubits))
    runs: list[dict] = t.value  # type: ignore[assignment]
    rows = []
    for n in cfg["qubits"]:
        sel = [r for r in runs if r["n"] == n]
        if len(sel) < 3:
            continue
        lengths = np.array(sel[0]["lengths"], dtype=float)
        y = np.array([r["means"] for r in sel])
        s = np.array([r["stderr"] for r in sel])
        s_fixed = s.mean(axis=0)
        own = np.array([_identity_fit(lengths, yi, si) for yi, si in zip(y, s)])
        fixed = np.array([_identity_fit(lengths, yi, s_fixed) for yi in y])
        pkg = np.array([r["lambda_I"] for r in sel])
        true = (np.trace(coverage_device(n).error.ptm) - 1) / (4**n - 1)
        # how the estimated weight of the longest length moves with the estimate
        rel_w = (s_fixed[-1] / s[:, -1]) ** 2
        rows.append({"n": n, "experiments": len(sel), "planned": _side_experiments(cfg, n), "lengths": list(lengths),
                     "lambda_true": float(true), "sd_package": float(np.std(pkg, ddof=1)),
                     "sd_own_weights": float(np.std(own, ddof=1)), "sd_fixed_weights": float(np.std(fixed, ddof=1)),
                     "bias_own_weights": float(np.mean(own) - true), "bias_fixed_weights": float(np.mean(fixed) - true),
                     "corr_package_own": float(np.corrcoef(pkg, own)[0, 1]),
                     "corr_error_longest_weight": float(np.corrcoef(own - true, rel_w)[0, 1]),
                     "stderr_cv": [float(v) for v in s.std(axis=0) / s.mean(axis=0)],
                     "mean_cpu_seconds": sc.mean([r["cpu_seconds"] for r in sel])})
    return {"config": _cfg_json(cfg), "rows": rows, "wall_seconds": t.wall}


# ---- part 1c: what would fix the intervals (tried on the identity decay) ----------------------
def _fit_with_se(lengths: np.ndarray, y: np.ndarray, s: np.ndarray) -> tuple[float, float]:
    """:func:`_identity_fit` and its Gauss-Newton standard error (weights ``1/s**2`` taken as known)."""
    import scipy.optimize

    s = np.maximum(s, 1e-15)  # a length whose values all agree (tiny samples): as the package's fit does

    def resid(x):
        return (y - x[0] * x[1] ** (lengths - 1)) / s

    sol = scipy.optimize.least_squares(resid, [y[0], 0.99], bounds=([-np.inf, -1.0], [np.inf, 1.0]))
    j = sol.jac
    try:
        se = float(np.sqrt(max(np.linalg.inv(j.T @ j)[1, 1], 0.0)))
    except np.linalg.LinAlgError:
        se = float("nan")
    return float(sol.x[1]), se


def _cv_stats(values: np.ndarray, ideal: np.ndarray, mu: float) -> tuple[float, float]:
    """Mean and standard error of the control-variate values of one length (one scalar beta)."""
    gc = ideal - ideal.mean()
    var = float(gc @ gc)
    beta = float((values - values.mean()) @ gc / var) if var > 1e-24 * max(1.0, abs(ideal.mean())) ** 2 * values.size \
        else 1.0
    c = values - beta * (ideal - mu)
    return float(c.mean()), float(np.std(c, ddof=1) / np.sqrt(c.size))


def _remedy_task(t: dict) -> dict:
    """Intervals of ``lambda_I`` by four bootstrap variants on one coverage experiment's data.

    Same plan and shots as the coverage experiment of this seed; the identity probe's
    per-sequence values (:func:`robusttomo.estimate.compute_correlations`), the control
    variate per length (:func:`_cv_stats`, as the package does it) and the identity-only fit
    (:func:`_fit_with_se`).  ``B`` replicates resample sequences within each length, as the
    package's bootstrap does.  Variants: ``fixed`` (percentile, weights of the full data held
    fixed: what the package did before 58fdae0), ``reweighted`` (percentile, weights re-estimated
    in every replicate), ``student`` (bootstrap-t: quantiles of ``(lambda* - lambda) / se*`` with
    re-estimated weights, scaled by the data's ``se``: what the package does since, on its joint
    fit), ``wald`` (``lambda +- 1.96 se``).
    """
    import robusttomo as rt
    from robusttomo.estimate import compute_correlations, probes_from_unitaries

    n, seed, boots = t["n"], t["seed"], t["bootstrap"]
    dev = coverage_device(n)
    plan = _plan(n, t["sequences"], seed)
    counts = rt.simulate(plan, dev, seed=seed + 1)
    w = sc.timed(lambda: compute_correlations(plan, counts, probes=probes_from_unitaries([np.eye(2**n)], ["I"])))
    corr = w.value
    lengths = np.array(corr.lengths, dtype=float)
    data = [(st.values[:, 0], st.ideal[:, 0], float(st.mu[0])) for st in corr.stats]

    def summarize(picks):
        ys, ss = zip(*(_cv_stats(v[p], g[p], mu) for (v, g, mu), p in zip(data, picks)))
        return np.array(ys), np.array(ss)

    full = [np.arange(v.size) for v, _, _ in data]
    y, sd = summarize(full)
    lam, se = _fit_with_se(lengths, y, sd)
    rng = np.random.default_rng(seed + 7)
    fixed, rew, tstat = [], [], []
    for _ in range(boots):
        ys, ss = summarize([rng.integers(0, v.size, size=v.size) for v, _, _ in data])
        fixed.append(_identity_fit(lengths, ys, sd))
        lr, ser = _fit_with_se(lengths, ys, ss)
        rew.append(lr)
        tstat.append((lr - lam) / ser if ser > 0 else np.nan)
    true = float((np.trace(dev.error.ptm) - 1) / (4**n - 1))
    tq = np.nanpercentile(tstat, [2.5, 97.5])
    iv = {"fixed": np.percentile(fixed, [2.5, 97.5]), "reweighted": np.percentile(rew, [2.5, 97.5]),
          "student": np.array([lam - tq[1] * se, lam - tq[0] * se]), "wald": np.array([lam - 1.96 * se, lam + 1.96 * se])}
    return {"n": n, "seed": seed, "code": sc.code_version(), "lambda": lam, "se": se, "true": true,
            "intervals": {k: [float(v[0]), float(v[1])] for k, v in iv.items()},
            "covered": {k: bool(v[0] <= true <= v[1]) for k, v in iv.items()}}


REMEDIES = ("fixed", "reweighted", "student", "wald")


def run_remedy(size: str, *, jobs: int = 1, raw=None, run_missing: bool = True, qubits=None) -> dict:
    """The bootstrap variants of :func:`_remedy_task` on the coverage experiments (same seeds)."""
    cfg = CONFIG[sc.check_size(size)]["coverage"]
    tasks = [{"n": n, "seed": 2_000_000 + 100_000 * n + 10 * i, "sequences": cfg["sequences"][n],
              "bootstrap": cfg["bootstrap"][n], "kind": "remedy"}
             for n in cfg["qubits"] for i in range(_side_experiments(cfg, n))]
    t = sc.timed(lambda: _run_some(_remedy_task, tasks, jobs=jobs, checkpoint=checkpoint_path(raw, "remedy", size),
                                   run_missing=run_missing, qubits=qubits))
    runs: list[dict] = t.value  # type: ignore[assignment]
    rows = []
    for n in cfg["qubits"]:
        sel = [r for r in runs if r["n"] == n]
        if not sel:
            continue
        row: dict[str, object] = {"n": n, "experiments": len(sel), "planned": _side_experiments(cfg, n),
                                  "sd_lambda": float(np.std([r["lambda"] for r in sel], ddof=1)) if len(sel) > 1
                                  else float("nan")}
        for k in REMEDIES:
            hits = sum(1 for r in sel if r["covered"][k])
            row[k] = {"hits": hits, "coverage": hits / len(sel), "coverage_ci": list(sc.clopper_pearson(hits, len(sel))),
                      "mean_width": sc.mean([r["intervals"][k][1] - r["intervals"][k][0] for r in sel]),
                      "missed_low": sum(1 for r in sel if r["intervals"][k][1] < r["true"]),
                      "missed_high": sum(1 for r in sel if r["intervals"][k][0] > r["true"])}
        rows.append(row)
    return {"config": _cfg_json(cfg), "rows": rows, "wall_seconds": t.wall}


def markdown_remedy(res: dict) -> str:
    if not res.get("rows"):
        return ""
    out = ["### What would fix the fidelity intervals (tried on the identity decay)", ""]
    out.append(
        "The same experiments (same seeds, same data), the identity probe alone (`study_coverage._remedy_task`: "
        "its per-sequence values, the control variate per length, a fit of `c lambda^(m-1)` weighted by the "
        "per-length standard errors), and four intervals for `lambda_I` from the same resampling of sequences "
        "within each length: \"fixed\" keeps the full data's weights in every replicate (what the package's "
        "bootstrap did before commit 58fdae0; it reproduced that package's coverage), \"reweighted\" re-estimates "
        "the weights in every replicate, \"student\" is the bootstrap-t interval (quantiles of "
        "`(lambda* - lambda)/se*` with re-estimated weights, scaled by the data's Gauss-Newton `se`; the "
        "package's fidelity interval since, on its joint fit), \"wald\" is `lambda +- 1.96 se`.")
    out.append("")
    rows = []
    for r in res["rows"]:
        for k in REMEDIES:
            e = r[k]
            rows.append([r["n"], k, f"{e['hits']}/{r['experiments']}", e["coverage"],
                         f"{sc.fmt(e['coverage_ci'][0])} to {sc.fmt(e['coverage_ci'][1])}", e["mean_width"],
                         e["mean_width"] / (2 * 1.96 * r["sd_lambda"]), f"{e['missed_low']}/{e['missed_high']}"])
    out.append(sc.md_table(["qubits", "interval", "covered", "coverage", "95% CI of coverage", "mean width",
                            "width / (3.92 sd over experiments)", "low/high misses"], rows))
    out.append("")
    return "\n".join(out)


def markdown_weights(res: dict) -> str:
    if not res["rows"]:
        return ""
    out = ["### Why the fidelity intervals are narrow: weights estimated from the data", ""]
    out.append(
        "For every coverage experiment (same seeds: same data, same point estimate; `bootstrap=0`) the "
        "identity probe's per-length means and standard errors are refitted with a fit of that probe alone "
        "(`study_coverage._identity_fit`, constant `c` at m = 1 and `c lambda^(m-1)` beyond), once with the "
        "experiment's own standard errors as weights and once with the weights fixed at their mean over "
        "experiments. The bootstrap replicates and the sandwich formula treat the weights as fixed; if the "
        "spread with estimated weights is larger, that extra variance is what the intervals miss. \"corr(error, "
        "weight of longest length)\": correlation over experiments between the error of the own-weights "
        "estimate and the relative weight its fit gave the longest length.")
    out.append("")
    out.append(sc.md_table(
        ["qubits", "experiments", "sd, package fit", "sd, own weights", "sd, fixed weights", "ratio own / fixed",
         "corr(package, own)", "corr(error, weight of longest length)", "cv of the std. errors per length"],
        [[r["n"], f"{r['experiments']}/{r['planned']}", r["sd_package"], r["sd_own_weights"], r["sd_fixed_weights"],
          r["sd_own_weights"] / r["sd_fixed_weights"], r["corr_package_own"], r["corr_error_longest_weight"],
          ", ".join(sc.fmt(v, 2) for v in r["stderr_cv"])] for r in res["rows"]]))
    out.append("")
    return "\n".join(out)


def _cfg_json(cfg: dict) -> dict:
    return {k: ({str(a): b for a, b in v.items()} if isinstance(v, dict) else v) for k, v in cfg.items()}


# ---- part 2: gate-dependent noise ------------------------------------------------------------
def gate_errors(n: int, strength: float) -> dict:
    """Native-gate errors scaled by ``strength`` (1 = the "weak" setting).

    ``h``: over-rotation about Y by ``0.04 s`` then depolarizing ``1 - 0.002 s``; ``s`` and
    ``sdg``: rotation about Z by ``0.03 s``; ``x, y, z``: depolarizing ``1 - 0.002 s``; two-qubit
    ``cx`` and ``cz``: ZZ rotation by ``0.05 s`` then two-qubit depolarizing ``1 - 0.01 s``.
    """
    from robusttomo.channels import depolarizing, rotation

    s = float(strength)
    one = {
        "h": depolarizing(1, 1 - 0.002 * s) @ rotation("Y", 0.04 * s),
        "s": rotation("Z", 0.03 * s),
        "sdg": rotation("Z", 0.03 * s),
        "x": depolarizing(1, 1 - 0.002 * s),
        "y": depolarizing(1, 1 - 0.002 * s),
        "z": depolarizing(1, 1 - 0.002 * s),
    }
    if n == 1:
        return one
    two = depolarizing(2, 1 - 0.01 * s) @ rotation("ZZ", 0.05 * s)
    return {**one, "cx": two, "cz": two}


def per_clifford_errors(n: int, errors: dict, indices: np.ndarray | None = None) -> np.ndarray:
    """PTMs of the per-Clifford errors ``E_C = N(C) o C^dagger``, shape ``(k, d*d, d*d)``.

    ``N(C)``: the compiled circuit of ``C`` (``robusttomo.clifford.clifford_circuits``, time
    order) with each native gate ``g`` followed by ``errors[g]`` on the gate's qubits (qubit
    order as in the circuit: ``(control, target)`` for ``cx``).  ``C^dagger`` has the transposed
    PTM (a unitary channel's PTM is orthogonal).  Default: every element of the group.
    """
    from robusttomo import channels, clifford
    from robusttomo.channels import Channel

    idx = np.arange(clifford.clifford_group_order(n)) if indices is None else np.asarray(indices)
    cache: dict[tuple, np.ndarray] = {}

    def gate(name: str, qubits: tuple[int, ...]) -> np.ndarray:
        key = (name, qubits)
        if key not in cache:
            g = Channel.from_unitary(clifford.gate_unitary(name))
            if name in errors:
                g = errors[name] @ g
            cache[key] = np.asarray(channels.embed(g, list(qubits), n).ptm)
        return cache[key]

    ideal = np.asarray(clifford.clifford_ptms(n, idx), dtype=float)
    out = np.empty_like(ideal)
    for k, circ in enumerate(clifford.clifford_circuits(n, idx)):
        r = np.eye(4**n)
        for name, qubits in circ:
            r = gate(name, tuple(int(q) for q in qubits)) @ r
        out[k] = r @ ideal[k].T
    return out


def _gate_task(t: dict) -> dict:
    import robusttomo as rt
    from robusttomo import metrics

    n, seed = t["n"], t["seed"]
    avg = _average_error(n, t["strength"])
    if t["control"]:
        dev = rt.Device.build(n, error=avg, readout=[(0.02, 0.04)] * n)
    else:
        dev = rt.Device.build(n, gate_errors=gate_errors(n, t["strength"]), readout=[(0.02, 0.04)] * n)
    plan = _plan(n, t["sequences"], seed)
    rec = rt.analyze(plan, rt.simulate(plan, dev, seed=seed + 1), bootstrap=0, models=False, ranges=False,
                     diamond=False)
    dec = rec.decays
    r_avg = 1 - metrics.average_gate_fidelity(avg)
    return {
        "n": n, "strength": t["strength"], "control": t["control"], "seed": seed,
        "infidelity_error": (1 - metrics.average_gate_fidelity(rec.error_channel)) - r_avg,
        "decay_infidelity_error": (1 - dec.average_gate_fidelity) - r_avg,
        "block_distance": float(np.linalg.norm(rec.error_channel.unital_block - avg.unital_block)),
        "constant_spread_p": dec.constant_spread_p,
        "reduced_chi2": dec.reduced_chi2,
        "spam_constant": dec.spam_constant,
        "warnings": list(rec.warnings),
        "flagged": any(_is_model_warning(w) for w in dec.warnings),
    }


#: Fragments of the DecayResult warnings that say the decay model itself is violated (the
#: others are about sample sizes or the solver).
MODEL_WARNINGS = ("spread more than their errors allow", "not single-exponential", "fits poorly")


def _is_model_warning(text: str) -> bool:
    return any(k in text for k in MODEL_WARNINGS)


_AVG_CACHE: dict[tuple[int, float], object] = {}


def _average_error(n: int, strength: float):
    """Average over the Clifford group of the per-Clifford errors, as a Channel."""
    from robusttomo.channels import Channel

    key = (n, float(strength))
    if key not in _AVG_CACHE:
        _AVG_CACHE[key] = Channel.from_ptm(per_clifford_errors(n, gate_errors(n, strength)).mean(axis=0))
    return _AVG_CACHE[key]


def run_gate(size: str, *, jobs: int = 1, raw=None, run_missing: bool = True, qubits=None) -> dict:
    """Gate-dependent noise against its gate-independent control; options as :func:`run_coverage`."""
    from robusttomo import metrics

    cfg = CONFIG[sc.check_size(size)]["gate"]
    strengths = (1.0, 3.0)
    tasks = [{"n": n, "strength": s, "control": c, "sequences": cfg["sequences"][n],
              "seed": 3_000_000 + 100_000 * n + 10_000 * int(s) + 1000 * int(c) + 10 * r}
             for n in cfg["qubits"] for s in strengths for c in (False, True) for r in range(cfg["repeats"])]
    t = sc.timed(lambda: _run_some(_gate_task, tasks, jobs=jobs, checkpoint=checkpoint_path(raw, "gate", size),
                                   run_missing=run_missing, qubits=qubits))
    runs: list[dict] = t.value  # type: ignore[assignment]
    rows = []
    for n in cfg["qubits"]:
        if not any(r["n"] == n for r in runs):
            continue
        for s in strengths:
            ptms = per_clifford_errors(n, gate_errors(n, s))
            fids = np.array([(np.trace(r) / 4**n * 2**n + 1) / (2**n + 1) for r in ptms])
            avg = _average_error(n, s)
            for c in (False, True):
                sel = [r for r in runs if r["n"] == n and r["strength"] == s and r["control"] == c]
                ie = [r["infidelity_error"] for r in sel]
                rows.append({
                    "n": n, "strength": s, "control": c, "repeats": len(sel),
                    "average_infidelity": 1 - metrics.average_gate_fidelity(avg),
                    "spread_of_per_clifford_infidelity": float(np.std(1 - fids)),
                    "max_per_clifford_infidelity": float(np.max(1 - fids)),
                    "mean_infidelity_error": sc.mean(ie),
                    "infidelity_error_stderr": float(np.std(ie, ddof=1) / np.sqrt(len(ie))) if len(ie) > 1 else float("nan"),
                    "mean_decay_infidelity_error": sc.mean([r["decay_infidelity_error"] for r in sel]),
                    "mean_block_distance": sc.mean([r["block_distance"] for r in sel]),
                    "median_constant_spread_p": float(np.nanmedian([r["constant_spread_p"] for r in sel]))
                    if any(np.isfinite(r["constant_spread_p"]) for r in sel) else float("nan"),
                    "flagged": sum(1 for r in sel if r["flagged"]),
                    "warnings": sorted({w for r in sel for w in r["warnings"]}),
                })
    return {"config": _cfg_json(cfg), "rows": rows, "runs": runs, "wall_seconds": t.wall}


SUBPARTS = ("coverage", "weights", "remedy", "gate")


def run(size: str = "small", *, jobs: int = 1, subparts: tuple[str, ...] = SUBPARTS, previous: dict | None = None,
        raw=None, run_missing: bool = True, qubits=None) -> dict:
    """Both parts; a JSON-ready dict.

    ``subparts`` not listed are copied from ``previous`` (an earlier result of this function,
    e.g. from the JSON store) with their own ``finished`` stamp; the other options go to
    :func:`run_coverage` and :func:`run_gate`.
    """
    import datetime

    bad = [p for p in subparts if p not in SUBPARTS]
    if bad:
        raise ValueError(f"'subparts' must be among {list(SUBPARTS)}; got {bad}")
    fns = {"coverage": run_coverage, "weights": run_weights, "remedy": run_remedy, "gate": run_gate}
    out = {}
    for name in SUBPARTS:
        if name in subparts:
            out[name] = fns[name](size, jobs=jobs, raw=raw, run_missing=run_missing, qubits=qubits)
            out[name]["finished"] = datetime.datetime.now().strftime("%Y-%m-%d %H:%M")
        elif previous is not None and name in previous:
            out[name] = sc.revive(previous[name])
        elif name in ("weights", "remedy"):  # added later than the others: older stores lack them
            out[name] = {"config": {}, "rows": [], "wall_seconds": 0.0}
        else:
            raise ValueError(f"sub-study {name!r} is neither run nor stored; run it (it is missing from the store)")
    return out


# ---- report ----------------------------------------------------------------------------------
def markdown(res: dict, *, figures: dict[str, str]) -> str:
    parts = [markdown_coverage(res["coverage"], figures=figures), markdown_weights(res.get("weights", {"rows": []})),
             markdown_remedy(res.get("remedy", {"rows": []})), _reading(res), markdown_gate(res["gate"])]
    return "\n".join(p for p in parts if p)


def _reading(res: dict) -> str:
    """One paragraph per qubit count that puts the numbers of the three fidelity tables side by side."""
    weights = {r["n"]: r for r in res.get("weights", {}).get("rows", [])}
    remedy = {r["n"]: r for r in res.get("remedy", {}).get("rows", [])}
    out = []
    for row in res["coverage"]["rows"]:
        n = row["n"]
        dg = row.get("diagnosis", {})
        if "agf" not in dg or "lambda_I" not in dg or n not in weights or n not in remedy:
            continue
        a, lam, w, rm = dg["agf"], dg["lambda_I"], weights[n], remedy[n]
        out.append(
            f"Reading, {n} qubit{'s' if n > 1 else ''}: the fidelity interval covered {row['agf']['hits']} of "
            f"{row['agf']['trials']} ({sc.fmt(row['agf']['coverage'])}). Centre: bias / sd "
            f"{sc.fmt(a['bias_over_sd'])}, oracle coverage {sc.fmt(a['oracle_coverage'])}. Width: ratio "
            f"{sc.fmt(a['width_ratio'])} (bootstrap sd of lambda_I {sc.fmt(lam['mean_bootstrap_sd'])}, spread over "
            f"experiments {sc.fmt(lam['sd_over_experiments'])}). Coverage of the narrower / wider half of the "
            f"intervals {sc.fmt(a['coverage_narrow_half'])} / {sc.fmt(a['coverage_wide_half'])}; low/high misses "
            f"{row['agf']['missed_low']}/{row['agf']['missed_high']}. Spread with estimated / fixed weights "
            f"{sc.fmt(w['sd_own_weights'] / w['sd_fixed_weights'])} (the package's bootstrap held the weights "
            f"fixed before 58fdae0). On the same data: the old package-like interval (\"fixed\") {sc.fmt(rm['fixed']['coverage'])}, weights "
            f"re-estimated per replicate {sc.fmt(rm['reweighted']['coverage'])}, bootstrap-t "
            f"{sc.fmt(rm['student']['coverage'])}.")
        out.append("")
    return "\n".join(out)


def markdown_coverage(cov: dict, *, figures: dict[str, str] | None = None) -> str:
    figures = figures or {}
    out = ["### Coverage of the 95% intervals", ""]
    out.append(
        "Device: error `random_channel(n, 0.1)` (fixed seed) after every Clifford, readout flips "
        "P(1|0) = 2%, P(0|1) = 4% and preparation flip 1% on every qubit. Each experiment draws its own "
        "default plan (100 shots per sequence), shots and bootstrap: `analyze(plan, counts, bootstrap=B, "
        "models=False, ranges=R, diamond=True)`. With `ranges=True` (the default) `analyze` reports the "
        "diamond distance's profile-likelihood interval over the CPTP channels consistent with the data; "
        "with `ranges=False` the bootstrap interval. Coverage is given with its exact (Clopper-Pearson) 95% "
        "interval; \"low/high misses\" count intervals entirely below / above the truth. \"identity "
        "decay\" is the interval of `figures.decay_fidelity`, a monotone function of `lambda_I`.")
    out.append("")
    rows = []
    for r in cov["rows"]:
        kind = "profile-likelihood" if cov["config"]["ranges"][str(r["n"])] else "bootstrap"
        for key, label in (("agf", "average gate fidelity"), ("dd", f"diamond distance ({kind} interval)"),
                           ("decay", "identity decay (lambda_I)"), ("dd_range", "diamond range (SDP)")):
            e = r[key]
            if e["trials"] == 0:
                continue
            rows.append([r["n"], label, f"{e['hits']}/{e['trials']}", e["coverage"],
                         f"{sc.fmt(e['coverage_ci'][0])} to {sc.fmt(e['coverage_ci'][1])}", e["mean_width"],
                         e.get("bias", float("nan")), e.get("bias_stderr", float("nan")),
                         "-" if "missed_low" not in e else f"{e['missed_low']}/{e['missed_high']}", r["bootstrap"]])
    out.append(sc.md_table(["qubits", "quantity", "covered", "coverage", "95% CI of coverage", "mean width",
                            "bias (est - true)", "bias stderr", "low/high misses", "replicates"], rows))
    out.append("")
    out.append("True values and runs: " + "; ".join(
        f"{r['n']} qubit(s): F_avg {sc.fmt(r['true_agf'], 5)}, diamond distance {sc.fmt(r['true_dd'])}; "
        f"{r['experiments']} of {r.get('planned', r['experiments'])} planned experiments finished; per analysis "
        f"{sc.fmt(r.get('mean_cpu_seconds', float('nan')))} s CPU, {sc.fmt(r['mean_seconds'])} s wall (shared machine); "
        f"code {', '.join(r.get('codes', ['?']))}; {r['runs_with_warnings']} of {r['experiments']} runs warned"
        for r in cov["rows"]) + ".")
    out.append("")
    drows = []
    for r in cov["rows"]:
        dg = r.get("diagnosis", {})
        for key, label in (("agf", "average gate fidelity"), ("dd", "diamond distance"), ("decay", "identity decay")):
            if key in dg:
                x = dg[key]
                drows.append([r["n"], label, x["sd"], x["width_ratio"], x["oracle_coverage"], x["bias_over_sd"],
                              f"{sc.fmt(x['coverage_narrow_half'])} / {sc.fmt(x['coverage_wide_half'])}",
                              f"{sc.fmt(x['lower_arm'])} / {sc.fmt(x['upper_arm'])}"])
    if drows:
        out.append(
            "Diagnosis. \"sd\": spread of the estimates over the experiments (what a 95% interval must "
            "match); \"width ratio\": mean width / (2 x 1.96 sd), 1 for a normal interval of the right width; "
            "\"oracle coverage\": share of experiments within 1.96 sd of the truth (an interval of the right "
            "width centred on the estimate: below 95% would point at bias or heavy tails rather than width); "
            "\"bias / sd\"; coverage among the narrower / wider half of the intervals; mean lower / upper arm "
            "(value - low, high - value).")
        out.append("")
        out.append(sc.md_table(["qubits", "quantity", "sd", "width ratio", "oracle coverage", "bias / sd",
                                "coverage narrow / wide half", "arms low / high"], drows))
        out.append("")
    lrows = [[r["n"], x["true"], x["mean"] - x["true"], x["sd_over_experiments"], x["mean_bootstrap_sd"],
              x["mean_sandwich_se"], x["normal_coverage_bootstrap_sd"], x["mean_bootstrap_shift"], x["mean_reduced_chi2"]]
             for r in cov["rows"] for x in [r.get("diagnosis", {}).get("lambda_I")] if x]
    if lrows:
        out.append("The identity decay behind the fidelity intervals: its spread over experiments against the "
                   "bootstrap standard deviation and the fit's sandwich standard error of one experiment (means "
                   "over experiments), the coverage of `lambda +- 1.96 x bootstrap sd`, the mean shift of the "
                   "bootstrap replicates from the estimate, and the fit's mean reduced chi-square.")
        out.append("")
        out.append(sc.md_table(["qubits", "lambda_I true", "bias", "sd over experiments", "bootstrap sd",
                                "sandwich se", "coverage +-1.96 boot sd", "bootstrap shift", "reduced chi2"], lrows))
        out.append("")
    out.append(sc.md_table(["qubits", "target", "measured", "verdict"],
                           [[t["n"], t["target"], t["value"], sc.verdict(t["met"])] for t in cov["targets"]]))
    out.append("")
    if "coverage" in figures:
        out.append(f"![coverage]({figures['coverage']})")
        out.append("")
    return "\n".join(out)


def markdown_gate(gate: dict) -> str:
    out = ["### Bias under gate-dependent noise", ""]
    out.append(
        "Each native gate of a Clifford's compiled circuit is followed by its own error "
        "(`study_coverage.gate_errors`: an over-rotated, slightly depolarizing `h`, Z-rotated `s`/`sdg`, "
        "depolarizing Paulis, ZZ-rotated and depolarizing `cx`/`cz`; strength 1 and 3), no error after "
        "the Clifford itself, readout 2%/4%. Truth: the Clifford-group average of the per-Clifford errors "
        "`E_C = N(C) o C^dagger`, rebuilt from the compiled circuits. \"control\" runs the "
        "gate-independent device whose error is exactly that average. `analyze(..., bootstrap=0)`; "
        "\"flagged\" counts runs whose `DecayResult.warnings` say the decay model is violated (per-probe "
        "constants spread, poor fit, identity decay not single-exponential).")
    out.append("")
    rows = []
    for r in gate["rows"]:
        rows.append([r["n"], r["strength"], "control" if r["control"] else "gate-dependent", r["repeats"],
                     r["average_infidelity"], r["spread_of_per_clifford_infidelity"], r["mean_infidelity_error"],
                     r["infidelity_error_stderr"], r["mean_decay_infidelity_error"], r["mean_block_distance"],
                     r["median_constant_spread_p"], f"{r['flagged']}/{r['repeats']}"])
    out.append(sc.md_table(["qubits", "strength", "device", "repeats", "avg infidelity (truth)",
                            "per-Clifford infidelity spread", "infidelity err (recon)", "stderr",
                            "infidelity err (decay)", "block distance", "median constant_spread_p",
                            "flagged"], rows))
    out.append("")
    ws = sorted({w for r in gate["rows"] if not r["control"] for w in r["warnings"]})
    if ws:
        out.append("Warnings seen on the gate-dependent devices: " + "; ".join(f"\"{w}\"" for w in ws[:6]) + ".")
        out.append("")
    return "\n".join(out)


def plot(res: dict, directory, *, rel: str, suffix: str = "") -> dict[str, str]:
    """One PNG: each experiment's interval of the average gate fidelity, sorted, with the truth."""
    from pathlib import Path

    plt = sc.pyplot()
    cov = res["coverage"]
    qubits = [r["n"] for r in cov["rows"]]
    fig, axes = plt.subplots(1, len(qubits), figsize=(5 * len(qubits), 3.6), squeeze=False)
    for ax, row in zip(axes[0], cov["rows"]):
        n = row["n"]
        sel = sorted([r for r in cov["runs"] if r["n"] == n], key=lambda r: r["agf"]["value"])
        x = np.arange(len(sel))
        lo = np.array([1 - r["agf"]["high"] for r in sel])
        hi = np.array([1 - r["agf"]["low"] for r in sel])
        val = np.array([1 - r["agf"]["value"] for r in sel])
        col = ["C0" if r["agf"]["covered"] else "C3" for r in sel]
        ax.vlines(x, lo, hi, colors=col, lw=1)
        ax.plot(x, val, ".", color="k", ms=2)
        ax.axhline(1 - row["true_agf"], color="k", lw=0.8, ls="--", label="true infidelity")
        ax.set_xlabel("experiment (sorted by estimate)")
        ax.set_ylabel("infidelity 1 - F_avg, 95% interval")
        ax.set_title(f"{n} qubit{'s' if n > 1 else ''}: covered {row['agf']['hits']}/{row['agf']['trials']}")
        ax.legend(fontsize=8)
    fig.tight_layout()
    sc.save_figure(fig, Path(directory) / f"study_coverage{suffix}.png")
    plt.close(fig)
    return {"coverage": f"{rel}/study_coverage{suffix}.png"}


def main(argv: list[str] | None = None) -> int:
    from pathlib import Path

    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--size", choices=sc.SIZES, default="small")
    ap.add_argument("--jobs", type=int, default=1)
    ap.add_argument("--sub", nargs="+", choices=SUBPARTS, default=list(SUBPARTS), help="sub-studies to run")
    ap.add_argument("--raw", type=Path, default=None,
                    help="directory of checkpoint files: resume, and merge with runs made elsewhere")
    ap.add_argument("--qubits", type=int, nargs="+", default=None, help="run new repeats only for these qubit counts")
    ap.add_argument("--import-stored", type=Path, default=None, metavar="JSON",
                    help="copy the coverage experiments stored in this results file into the checkpoint of --raw "
                         "(to resume a partial study), then exit")
    args = ap.parse_args(argv)
    if args.raw is not None:
        args.raw.mkdir(parents=True, exist_ok=True)
    if args.import_stored is not None:
        if args.raw is None:
            ap.error("--import-stored needs --raw")
        import json

        store = json.loads(args.import_stored.read_text(encoding="utf-8"))
        k = import_stored(args.size, store, args.raw, label=f"{args.import_stored.name}, key {args.size}")
        print(f"imported {k} experiments into {args.raw}")
        return 0
    fns = {"coverage": (run_coverage, markdown_coverage), "weights": (run_weights, markdown_weights),
           "remedy": (run_remedy, markdown_remedy), "gate": (run_gate, markdown_gate)}
    for name in args.sub:
        print(fns[name][1](fns[name][0](args.size, jobs=args.jobs, raw=args.raw, qubits=args.qubits)))
    return 0


if __name__ == "__main__":
    sys.exit(main())
