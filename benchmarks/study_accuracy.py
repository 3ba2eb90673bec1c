"""Accuracy per shot: robusttomo against conventional tomography and standard benchmarking.

Run from the repository root (``run_all.py`` runs it as part of the study)::

    python benchmarks/study_accuracy.py [--size smoke|small|full] [--jobs 2]

Two parts.

1. **Side by side.**  One simulated device per qubit count (the gate error of
   :func:`study_common.general_error` after every Clifford, symmetric readout flips 0%, 1%,
   3% per qubit, perfect preparation).  For every repeat, the same total number of shots goes
   to (a) robusttomo: the package's default plan (:func:`robusttomo.make_plan`), simulated and
   analyzed (:func:`robusttomo.analyze`); (b) conventional process tomography with CPTP
   projection (``baselines.process_tomography``, six inputs per qubit); (c) standard
   randomized benchmarking with the inversion gate (``baselines.randomized_benchmarking``).
   Reported per setting: root-mean-square error of the estimated infidelity ``1 - F_avg``, of
   the diamond distance and of the unital block (Frobenius), and the mean width of the 95%
   fidelity interval.

   **Fidelity interval against benchmarking, lengths chosen the same way.**  Benchmarking gets
   lengths chosen from the true decay ``p`` of the identity (:func:`rb_lengths`: doubling up
   to about ``1/(1-p)``), i.e. lengths suited to the one number it measures.  The default plan
   is a general-purpose plan for the whole unital block (lengths up to 24 or 16), so comparing
   its fidelity interval with benchmarking's compares unequally tuned experiments.  So every
   repeat also runs (d) robusttomo with a **fidelity plan**, tuned from the same information:
   :func:`fidelity_allocation` asks the package's precision planner
   (:func:`robusttomo.planner.choose_plan`) for the cheapest plan that pins the average gate
   fidelity, on the planner's assumed device built from the true average infidelity alone
   (``assumed_device(n, average_error=1 - F_avg, readout_error=0)``: benchmarking's lengths
   do not use the readout level either), 100 shots per sequence, device time proportional to
   the shots; its lengths and its proportions of sequences per length are kept and the
   sequence counts scaled to the default plan's total, so (d) spends exactly the shots of (a)
   and of (c).  The width target is checked for both plans; the fidelity plan is the
   like-for-like comparison.

2. **Crossover budget of the unital block** (two qubits, readout 1% and 3%, the
   coherent+stochastic device of :func:`study_common.generator_error`).  Tomography's
   squared error is ``bias**2 + v_tomo / N`` for ``N`` total shots: the bias from exact
   probabilities (``total_shots=None``), the variance term measured by repeats at every budget
   of a grid (tomography is cheap to simulate at any ``N``).  Ours has no SPAM bias; its mean
   squared error is measured by repeats at a few budgets (100 shots per sequence, the number
   of sequences scaling with ``N``) for the full CPTP reconstruction and the reduced
   "coherent+stochastic" model (:func:`robusttomo.models.fit_generator_model`), and the
   crossover is where the two curves meet (:func:`_crossover`).
"""

from __future__ import annotations

import study_common as sc  # first: pins BLAS threads before numpy loads

import argparse  # noqa: E402
import sys  # noqa: E402

import numpy as np  # noqa: E402

#: Sizes.  ``repeats``/``bootstrap`` per qubit count; ``sequences`` None means the default plan.
CONFIG: dict[str, dict] = {
    "smoke": {
        "side": {"qubits": (1,), "readouts": (0.03,), "repeats": {1: 1}, "bootstrap": {1: 10},
                 "sequences": {1: 120}, "rb_sequences": 10},
        "cross": {"n_qubits": 1, "readouts": (0.03,), "sequences": (60, 120), "repeats": 1,
                  "tomo_budgets": (1e3, 1e5, 1e7), "tomo_repeats": 5},
    },
    "small": {
        "side": {"qubits": (1, 2), "readouts": (0.0, 0.01, 0.03), "repeats": {1: 4, 2: 2},
                 "bootstrap": {1: 50, 2: 20}, "sequences": {1: None, 2: None}, "rb_sequences": 50,
                 "fid_decay_only": (2,)},
        "cross": {"n_qubits": 2, "readouts": (0.01, 0.03), "sequences": (600, 1800), "repeats": 2,
                  "tomo_budgets": tuple(10.0 ** np.arange(4, 9.5, 0.5)), "tomo_repeats": 20},
    },
    "full": {
        "side": {"qubits": (1, 2), "readouts": (0.0, 0.01, 0.03), "repeats": {1: 20, 2: 20},
                 "bootstrap": {1: 200, 2: 200}, "sequences": {1: None, 2: None}, "rb_sequences": 50,
                 "fid_decay_only": (2,)},
        "cross": {"n_qubits": 2, "readouts": (0.01, 0.03), "sequences": (450, 1800, 7200), "repeats": 20,
                  "tomo_budgets": tuple(10.0 ** np.arange(4, 9.5, 0.5)), "tomo_repeats": 100},
    },
}

# targets of the benchmark issue
INFIDELITY_RATIO_TARGET = 0.2   # ours / tomography at 3% readout
WIDTH_RATIO_TARGET = 1.5        # ours / standard benchmarking
CROSSOVER_TARGET = 1e7          # reduced model, 3% readout, two qubits


def _plan(n: int, sequences: int | None, seed: int):
    import robusttomo as rt
    from robusttomo.plan import default_lengths

    if sequences is None:
        return rt.make_plan(n_qubits=n, seed=seed)
    lengths = default_lengths(n)
    return rt.make_plan(n_qubits=n, lengths=lengths, sequences=sc.split_sequences(sequences, lengths), seed=seed)


def _plan_shots(plan) -> int:
    return int(plan.shots) * int(sum(b.n_sequences for b in plan.blocks))


#: Precision asked of the planner for the fidelity plan: small enough that no length sits at the
#: planner's floor of sequences, so the proportions are those of the unconstrained optimum.
_PLANNER_TARGET = 1e-5


def fidelity_allocation(n: int, error, total_sequences: int) -> dict:
    """Lengths and sequences of the fidelity plan (see the module docstring), ``total_sequences`` in all.

    ``choose_plan`` on ``assumed_device(n, average_error=1 - F_avg(error), readout_error=0)``
    with a standard-error target of ``1e-5`` on ``average_gate_fidelity``, ``shots=100``,
    costs of 1 s per shot and nothing per sequence (device time = shots), pilot seed 0; its
    lengths are kept and its sequence counts rescaled to ``total_sequences``
    (:func:`study_common.allocate`), with the planner's own floor of sequences per length
    (``choose_plan``'s ``min_sequences`` default, 50: its predictions are large-sample ones),
    capped at ``total_sequences / len(lengths)`` for tiny budgets.
    """
    import inspect

    from robusttomo import metrics
    from robusttomo.planner import assumed_device, choose_plan

    r = 1 - metrics.average_gate_fidelity(error)
    prop = choose_plan(n_qubits=n, device=assumed_device(n, average_error=float(r), readout_error=0.0),
                       targets={"average_gate_fidelity": _PLANNER_TARGET},
                       costs={"seconds_per_shot": 1.0, "seconds_per_sequence": 0.0}, shots=100, seed=0)
    floor = min(int(inspect.signature(choose_plan).parameters["min_sequences"].default),
                int(total_sequences) // len(prop.lengths))
    seqs = sc.allocate(int(total_sequences), prop.sequences, floor=floor)
    return {"lengths": [int(m) for m in prop.lengths], "sequences": seqs, "floor": floor,
            "planner_sequences": [int(k) for k in prop.sequences], "average_error": float(r)}


def _default_total(n: int, sequences: int | None) -> int:
    plan = _plan(n, sequences, 0)
    return int(sum(b.n_sequences for b in plan.blocks))


def rb_lengths(error) -> list[int]:
    """Doubling lengths from 1 up to the first power of two at or above ``1 / (1 - p)``.

    ``p`` is the true decay: benchmarking gets lengths suited to the error it measures.
    """
    d2 = error.ptm.shape[0]
    p = (np.trace(error.ptm) - 1) / (d2 - 1)
    top = 2 ** int(np.ceil(np.log2(max(1.0 / max(1 - p, 1e-9), 8.0))))
    return [2**k for k in range(int(np.log2(top)) + 1)]


# ---- part 1: side by side --------------------------------------------------------------------
def _side_task(t: dict) -> dict:
    import baselines as bl
    import robusttomo as rt
    from robusttomo import metrics

    n, e, seed = t["n"], t["readout"], t["seed"]
    err = sc.general_error(n)
    dev = sc.device(n, err, e)
    spam = bl.SpamModel.from_device(dev)
    b_true = err.unital_block
    r_true = 1 - metrics.average_gate_fidelity(err)
    dd_true = metrics.diamond_distance(err)

    plan = _plan(n, t["sequences"], seed)
    shots = _plan_shots(plan)
    counts = rt.simulate(plan, dev, seed=seed + 1)
    rec = rt.analyze(plan, counts, bootstrap=t["bootstrap"], seed=seed + 2, models=False, ranges=False,
                     diamond=False)
    agf, dfid = rec.figures.average_gate_fidelity, rec.figures.decay_fidelity
    f_true = 1 - r_true
    ours = {
        "low": agf.low, "high": agf.high, "covered": agf.contains(f_true), "decay_covered": dfid.contains(f_true),
        "infidelity_error": (1 - agf.value) - r_true,
        "diamond_error": metrics.diamond_distance(rec.error_channel) - dd_true,
        "block_error": float(np.linalg.norm(rec.error_channel.unital_block - b_true)),
        "width": agf.high - agf.low,
        "decay_infidelity_error": (1 - dfid.value) - r_true,
        "decay_width": dfid.high - dfid.low,
        "shots": shots,
        "warnings": list(rec.warnings),
    }
    rng = np.random.default_rng(seed + 3)
    tomo = bl.process_tomography(err, spam=spam, total_shots=shots, rng=rng)
    tomo_res = {
        "infidelity_error": (1 - metrics.average_gate_fidelity(tomo)) - r_true,
        "diamond_error": metrics.diamond_distance(tomo) - dd_true,
        "block_error": float(np.linalg.norm(tomo.unital_block - b_true)),
        "width": float("nan"),
        "shots": bl.tomography_budget(n, shots).total_shots,
    }
    rb = bl.randomized_benchmarking(err, lengths=rb_lengths(err), n_sequences=t["rb_sequences"], rng=rng,
                                    spam=spam, total_shots=shots)
    lo, hi = rb.fidelity_interval
    rb_res = {
        "low": float(lo), "high": float(hi), "covered": bool(lo <= f_true <= hi),
        "infidelity_error": rb.average_error - r_true,
        "diamond_error": float("nan"),
        "block_error": float("nan"),
        "width": float(hi - lo),
        "shots": rb.total_shots,
    }
    return {"n": n, "readout": e, "seed": seed, "ours": ours, "tomography": tomo_res, "benchmarking": rb_res,
            "code": sc.code_version()}


def _fid_decay_only(t: dict, plan, counts, r_true: float) -> dict:
    """Fidelity-plan repeat from the decay fit alone (``estimate_decays``, same bootstrap seed).

    The identity decay's fidelity ``1 - (d-1)(1-lambda_I)/d`` and its studentized interval
    (``DecayResult.identity_decay_interval``, mapped): what ``analyze`` reports as
    ``figures.decay_fidelity`` (``analyze`` passes its seed to the same decay bootstrap).
    The channel's errors (diamond distance, unital block) are those of the CPTP point
    estimate ``analyze(bootstrap=0)`` of the same data: the plan gives the whole channel too.
    """
    import robusttomo as rt
    from robusttomo import metrics

    n = t["n"]
    d = 2**n
    dec = rt.estimate_decays(plan, counts, bootstrap=t["bootstrap"], seed=t["seed"] + 12)
    k = dec.probes.labels.index("I")
    value = 1 - (d - 1) * (1 - float(dec.lambdas[k])) / d
    lo, hi = (1 - (d - 1) * (1 - x) / d for x in dec.identity_decay_interval())
    f_true = 1 - r_true
    # the whole channel from the same data: the CPTP point estimate (no re-fits)
    rec = rt.analyze(plan, counts, bootstrap=0, models=False, ranges=False, diamond=False)
    err = sc.general_error(n)
    return {"low": lo, "high": hi, "covered": bool(lo <= f_true <= hi), "decay_covered": bool(lo <= f_true <= hi),
            "infidelity_error": (1 - value) - r_true,
            "diamond_error": metrics.diamond_distance(rec.error_channel) - metrics.diamond_distance(err),
            "block_error": float(np.linalg.norm(rec.error_channel.unital_block - err.unital_block)),
            "point_infidelity_error": (1 - rec.figures.average_gate_fidelity.value) - r_true,
            "width": hi - lo, "decay_infidelity_error": (1 - value) - r_true, "decay_width": hi - lo,
            "shots": _plan_shots(plan), "warnings": sorted(set(dec.warnings) | set(rec.warnings)), "decay_only": True}


def _fid_task(t: dict) -> dict:
    """The fidelity plan of one repeat: same device, its own sequences, shots and bootstrap.

    With ``t["decay_only"]`` the decay fit alone (:func:`_fid_decay_only`) instead of the
    whole analysis: in every repeat where both were computed the average gate fidelity
    interval of the reconstruction equalled the decay's (``run_side`` reports the largest
    difference), and the reconstruction's bootstrap re-fits cost about 0.5 s CPU per replicate
    for the two-qubit fidelity plan (few length-2 sequences), about 95 s per repeat.
    """
    import robusttomo as rt
    from robusttomo import metrics

    n, e, seed = t["n"], t["readout"], t["seed"]
    err = sc.general_error(n)
    dev = sc.device(n, err, e)
    r_true = 1 - metrics.average_gate_fidelity(err)
    f_true = 1 - r_true
    fid = t["fidelity_plan"]
    plan = rt.make_plan(n_qubits=n, lengths=fid["lengths"], sequences=fid["sequences"], seed=seed + 10)
    counts = rt.simulate(plan, dev, seed=seed + 11)
    if t.get("decay_only"):
        return {"n": n, "readout": e, "seed": seed, "code": sc.code_version(),
                "ours_fid": _fid_decay_only(t, plan, counts, r_true)}
    rec = rt.analyze(plan, counts, bootstrap=t["bootstrap"], seed=seed + 12,
                     models=False, ranges=False, diamond=False)
    agf, dfid = rec.figures.average_gate_fidelity, rec.figures.decay_fidelity
    return {"n": n, "readout": e, "seed": seed, "code": sc.code_version(), "ours_fid": {
        "low": agf.low, "high": agf.high, "covered": agf.contains(f_true), "decay_covered": dfid.contains(f_true),
        "infidelity_error": (1 - agf.value) - r_true,
        "diamond_error": metrics.diamond_distance(rec.error_channel) - metrics.diamond_distance(err),
        "block_error": float(np.linalg.norm(rec.error_channel.unital_block - err.unital_block)),
        "width": agf.high - agf.low,
        "decay_infidelity_error": (1 - dfid.value) - r_true,
        "decay_width": dfid.high - dfid.low,
        "shots": _plan_shots(plan),
        "warnings": list(rec.warnings),
    }}


def _side_tasks(cfg: dict) -> list[dict]:
    return [{"n": n, "readout": e, "seed": 100_000 * n + 1000 * i + 10 * r, "bootstrap": cfg["bootstrap"][n],
             "sequences": cfg["sequences"][n], "rb_sequences": cfg["rb_sequences"]}
            for n in cfg["qubits"] for i, e in enumerate(cfg["readouts"]) for r in range(cfg["repeats"][n])]


def import_stored(size: str, store: dict, raw, *, label: str) -> int:
    """Put the stored side-by-side repeats of ``size`` into the checkpoint in ``raw``.

    The repeats of the default plan, tomography and benchmarking are a deterministic function
    of their task (seeds included), so repeats stored by an earlier run of the same code are
    those a rerun would compute; each imported record says where it came from
    (``imported``).  Returns the number imported (tasks already in the checkpoint are kept).
    """
    from pathlib import Path

    cfg = CONFIG[sc.check_size(size)]["side"]
    part = store[size]["parts"]["accuracy"]
    by = {(r["n"], r["readout"], r["seed"]): r for r in part["results"]["side"]["runs"]}
    ck = Path(raw) / f"accuracy_side_{size}.jsonl"
    have = sc.load_checkpoint(ck)
    k = 0
    for t in _side_tasks(cfg):
        key = sc.task_key(t)
        r = by.get((t["n"], t["readout"], t["seed"]))
        if key in have or r is None:
            continue
        rec = {m: r[m] for m in ("n", "readout", "seed", "ours", "tomography", "benchmarking")}
        rec["imported"] = f"{label} (finished {part['finished']})"
        sc._append_record(ck, key, t, rec)
        k += 1
    return k


METHODS = ("ours", "ours_fid", "tomography", "benchmarking")


def _fidelity_plans(cfg: dict, raw, size: str) -> dict[int, dict]:
    """The fidelity plan of every qubit count; with ``raw``, computed once and kept there.

    Kept so that a later summary of the saved repeats finds the same tasks even if the
    planner's code has changed in between.
    """
    import json
    from pathlib import Path

    path = None if raw is None else Path(raw) / f"accuracy_side_{size}.fidelity_plans.json"
    if path is not None and path.exists():
        stored = {int(k): v for k, v in json.loads(path.read_text(encoding="utf-8")).items()}
        if all(n in stored for n in cfg["qubits"]):
            return stored
    plans = {n: fidelity_allocation(n, sc.general_error(n), _default_total(n, cfg["sequences"][n]))
             for n in cfg["qubits"]}
    if path is not None:
        sc.write_json(path, plans)
    return plans


def run_side(size: str, *, jobs: int = 1, raw=None, run_missing: bool = True) -> dict:
    """Side-by-side comparison; ``raw``: directory of a checkpoint file (resume, merge);
    ``run_missing=False``: run nothing, every repeat must be in the checkpoint already."""
    from pathlib import Path

    cfg = CONFIG[sc.check_size(size)]["side"]
    fid_plans = _fidelity_plans(cfg, raw, size)
    tasks = _side_tasks(cfg)
    fid_tasks = [{"n": t["n"], "readout": t["readout"], "seed": t["seed"], "bootstrap": t["bootstrap"],
                  "fidelity_plan": {"lengths": fid_plans[t["n"]]["lengths"],
                                    "sequences": fid_plans[t["n"]]["sequences"]},
                  **({"decay_only": True} if t["n"] in cfg.get("fid_decay_only", ()) else {})} for t in tasks]
    ck = None if raw is None else Path(raw) / f"accuracy_side_{size}.jsonl"
    ck_fid = None if raw is None else Path(raw) / f"accuracy_fid_{size}.jsonl"

    t = sc.timed(lambda: (sc.run_tasks(_side_task, tasks, jobs=jobs, checkpoint=ck, run_missing=run_missing),
                          sc.run_tasks(_fid_task, fid_tasks, jobs=jobs, checkpoint=ck_fid, run_missing=run_missing)))
    runs, fid_runs = t.value  # type: ignore[misc]
    if len(runs) < len(tasks) or len(fid_runs) < len(fid_tasks):
        raise ValueError(f"only {len(runs)} + {len(fid_runs)} of {len(tasks)} + {len(fid_tasks)} side-by-side repeats "
                         f"are saved in {ck} and {ck_fid}; run them (without --summarize) first")
    fby = {(r["n"], r["readout"], r["seed"]): {**r["ours_fid"], "code": r.get("code")} for r in fid_runs}
    runs = [{**r, "ours_fid": fby[(r["n"], r["readout"], r["seed"])]} for r in runs]
    # the reconstruction's fidelity interval against the decay's, wherever both were computed
    both = [x[m] for x in runs for m in ("ours", "ours_fid") if not x[m].get("decay_only")]
    same = max((abs(v["width"] - v["decay_width"]) + abs(v["infidelity_error"] - v["decay_infidelity_error"])
                for v in both), default=float("nan"))
    settings = []
    for n in cfg["qubits"]:
        err = sc.general_error(n)
        from robusttomo import metrics

        for e in cfg["readouts"]:
            sel = [x for x in runs if x["n"] == n and x["readout"] == e]
            row: dict[str, object] = {"n": n, "readout": e, "repeats": len(sel),
                                      "true_infidelity": 1 - metrics.average_gate_fidelity(err),
                                      "true_diamond": metrics.diamond_distance(err),
                                      "rb_lengths": rb_lengths(err), "fidelity_plan": fid_plans[n]}
            for method in METHODS:
                vals = [x[method] for x in sel]
                row[method] = {
                    "rms_infidelity_error": sc.rms([v["infidelity_error"] for v in vals]),
                    "mean_infidelity_error": sc.mean([v["infidelity_error"] for v in vals]),
                    "rms_diamond_error": sc.rms([v["diamond_error"] for v in vals]),
                    "rms_block_error": sc.rms([v["block_error"] for v in vals]),
                    "mean_width": sc.mean([v["width"] for v in vals]),
                    "shots": int(np.mean([v["shots"] for v in vals])),
                }
                m = row[method]
                if method != "tomography":
                    # 1 when the interval is as wide as a normal 95% interval of the actual error
                    m["width_over_rms"] = m["mean_width"] / (2 * 1.96 * m["rms_infidelity_error"])
                if method != "tomography" and all("covered" in v for v in vals):
                    hits = sum(1 for v in vals if v["covered"])
                    m["covered"] = hits
                    m["coverage_ci"] = list(sc.clopper_pearson(hits, len(vals)))
            for method in ("ours", "ours_fid"):
                row[method]["rms_decay_infidelity_error"] = sc.rms([x[method]["decay_infidelity_error"] for x in sel])
                row[method]["mean_decay_width"] = sc.mean([x[method]["decay_width"] for x in sel])
                row[method]["runs_with_warnings"] = sum(1 for x in sel if x[method]["warnings"])
                row[method]["warnings"] = sorted({w for x in sel for w in x[method]["warnings"]})
                if all("decay_covered" in x[method] for x in sel):
                    row[method]["decay_covered"] = sum(1 for x in sel if x[method]["decay_covered"])
            row["imported"] = sorted({x["imported"] for x in sel if x.get("imported")})
            row["codes"] = sorted({str(c) for x in sel for c in (x.get("code"), x["ours_fid"].get("code")) if c})
            settings.append(row)
    targets = []
    for n in cfg["qubits"]:
        for row in settings:
            if row["n"] != n:
                continue
            o, of, tm, rb = row["ours"], row["ours_fid"], row["tomography"], row["benchmarking"]
            if row["readout"] == 0.03:
                ratio = o["rms_infidelity_error"] / tm["rms_infidelity_error"]
                targets.append({"n": n, "readout": row["readout"], "target": "infidelity error <= 1/5 of tomography's",
                                "value": ratio, "limit": INFIDELITY_RATIO_TARGET,
                                "met": bool(ratio <= INFIDELITY_RATIO_TARGET)})
            wf = of["mean_width"] / rb["mean_width"]
            targets.append({"n": n, "readout": row["readout"],
                            "target": "fidelity interval <= 1.5x benchmarking's (fidelity plan: lengths by the planner)",
                            "value": wf, "limit": WIDTH_RATIO_TARGET, "met": bool(wf <= WIDTH_RATIO_TARGET)})
            w = o["mean_width"] / rb["mean_width"]
            targets.append({"n": n, "readout": row["readout"],
                            "target": "fidelity interval <= 1.5x benchmarking's (default plan)",
                            "value": w, "limit": WIDTH_RATIO_TARGET, "met": bool(w <= WIDTH_RATIO_TARGET)})
    return {"config": _cfg_json(cfg), "settings": settings, "targets": targets, "runs": runs,
            "wall_seconds": t.wall, "recon_vs_decay_max_diff": same, "recon_vs_decay_repeats": len(both)}


def _cfg_json(cfg: dict) -> dict:
    return {k: ({str(a): b for a, b in v.items()} if isinstance(v, dict) else v) for k, v in cfg.items()}


# ---- part 2: crossover budget ----------------------------------------------------------------
def _cross_ours_task(t: dict) -> dict:
    import robusttomo as rt
    from robusttomo.models import fit_generator_model

    n, e, seed = t["n"], t["readout"], t["seed"]
    err = sc.generator_error(n)
    dev = sc.device(n, err, e)
    plan = _plan(n, t["sequences"], seed)
    counts = rt.simulate(plan, dev, seed=seed + 1)
    rec = rt.analyze(plan, counts, bootstrap=0, models=False, ranges=False, diamond=False)
    red = fit_generator_model(rec.decays.observations())
    b = err.unital_block
    return {"n": n, "readout": e, "sequences": t["sequences"], "shots": _plan_shots(plan),
            "full_sq_error": float(np.sum((rec.error_channel.unital_block - b) ** 2)),
            "reduced_sq_error": float(np.sum((red.unital_block - b) ** 2))}


def _model_floor(n: int, error, readout: float, seed: int) -> dict:
    """Squared block error of each model fitted to noise-free observations of ``error``.

    The design and covariance come from one simulated run; the values are replaced by their
    exact expectations ``design @ b_true``.  Zero (to solver accuracy) when the truth lies in
    the model; otherwise the model's own bias floor.
    """
    import robusttomo as rt
    from robusttomo.fit import LinearObservations
    from robusttomo.models import fit_generator_model
    from robusttomo.reconstruct import fit_cptp

    plan = _plan(n, None, seed)
    rec = rt.analyze(plan, rt.simulate(plan, sc.device(n, error, readout), seed=seed + 1), bootstrap=0,
                     models=False, ranges=False, diamond=False)
    obs = rec.decays.observations()
    b = error.unital_block
    exact = LinearObservations(n, obs.design, obs.design @ b.reshape(-1), obs.covariance, obs.labels)
    full = fit_cptp(exact).channel.unital_block
    red = fit_generator_model(exact).unital_block
    return {"full": float(np.sum((full - b) ** 2)), "reduced": float(np.sum((red - b) ** 2))}


def _where(m: dict) -> str:
    if m["crossover_shots"] == 0:
        return "none: ours the more accurate at every budget (v <= v_tomo)"
    return {"below": "below the measured budgets (extrapolated)", "above": "above the measured budgets (extrapolated)",
            "between": "between measured budgets (interpolated)"}[m["crossover_where"]]


def _crossover(per_budget: list[dict], bias2: float, v_tomo: float) -> tuple[float, str]:
    """Budget where our mean squared error meets tomography's ``bias2 + v_tomo / N``.

    Our error is measured at a few budgets; between them ``log MSE`` is interpolated linearly in
    ``log N``.  Outside, it is extrapolated with the ``1/N`` law from the nearest budget
    (``MSE = v_i / N``), and ``where`` says so: ``"below"`` (ours is already the more accurate
    at the smallest budget measured), ``"above"`` (still the less accurate at the largest) or
    ``"between"``.  Returns ``(N*, where)``; ``N* = 0`` when ours wins at every budget even by
    extrapolation (``v_i <= v_tomo``), ``inf`` when it never wins (``bias2 = 0``).
    """
    ns = np.array([p["shots"] for p in per_budget], dtype=float)
    ours = np.array([p["mse"] for p in per_budget])
    tomo = bias2 + v_tomo / ns
    better = ours < tomo
    if better.all():
        v = per_budget[0]["v"]
        return (max((v - v_tomo) / bias2, 0.0) if bias2 > 0 else 0.0), "below"
    if not better.any():
        v = per_budget[-1]["v"]
        return ((v - v_tomo) / bias2 if bias2 > 0 else float("inf")), "above"
    k = int(np.flatnonzero(better)[0])  # first budget where ours wins; k >= 1 here
    x0, x1 = np.log(ns[k - 1]), np.log(ns[k])
    g0 = np.log(ours[k - 1]) - np.log(tomo[k - 1])
    g1 = np.log(ours[k]) - np.log(tomo[k])
    return float(np.exp(x0 + (x1 - x0) * g0 / (g0 - g1))), "between"


def run_cross(size: str, *, jobs: int = 1) -> dict:
    import baselines as bl

    cfg = CONFIG[sc.check_size(size)]["cross"]
    n = cfg["n_qubits"]
    err = sc.generator_error(n)
    b_true = err.unital_block
    tasks = [{"n": n, "readout": e, "sequences": s, "seed": 500_000 + 1000 * i + 100 * j + r}
             for i, e in enumerate(cfg["readouts"]) for j, s in enumerate(cfg["sequences"])
             for r in range(cfg["repeats"])]
    t = sc.timed(lambda: sc.run_tasks(_cross_ours_task, tasks, jobs=jobs))
    ours_runs: list[dict] = t.value  # type: ignore[assignment]
    out = []
    for i, e in enumerate(cfg["readouts"]):
        spam = bl.SpamModel.from_device(sc.device(n, err, e))
        exact = bl.process_tomography(err, spam=spam, total_shots=None)
        bias2 = float(np.sum((exact.unital_block - b_true) ** 2))
        rng = np.random.default_rng(900_000 + i)
        sel = [x for x in ours_runs if x["readout"] == e]
        ours_budgets = sorted({x["shots"] for x in sel})
        budgets = sorted(set(int(b) for b in cfg["tomo_budgets"]) | set(ours_budgets))
        tomo_rows = []
        for nb in budgets:
            spent = bl.tomography_budget(n, nb).total_shots
            sq, var = [], []
            for _ in range(cfg["tomo_repeats"]):
                est = bl.process_tomography(err, spam=spam, total_shots=nb, rng=rng).unital_block
                sq.append(float(np.sum((est - b_true) ** 2)))
                var.append(float(np.sum((est - exact.unital_block) ** 2)))
            tomo_rows.append({"budget": nb, "shots": spent, "mse": float(np.mean(sq)),
                              "variance_term": float(np.mean(var)), "v": spent * float(np.mean(var))})
        # the variance coefficient at large budgets, where the 1/N law holds
        big = [r["v"] for r in tomo_rows if r["shots"] >= 1e6] or [tomo_rows[-1]["v"]]
        v_tomo = float(np.mean(big))
        floor = _model_floor(n, err, e, 700_000 + i)
        models = {}
        for key, name in (("full_sq_error", "full"), ("reduced_sq_error", "coherent+stochastic")):
            per_budget = []
            for nb in ours_budgets:
                vals = np.array([x[key] for x in sel if x["shots"] == nb])
                per_budget.append({"shots": nb, "mse": float(vals.mean()), "v": float(nb * vals.mean()),
                                   "v_stderr": float(nb * vals.std(ddof=1) / np.sqrt(vals.size)) if vals.size > 1
                                   else float("nan"), "repeats": int(vals.size)})
            cross, where = _crossover(per_budget, bias2, v_tomo)
            v_se = [p["v_stderr"] for p in per_budget]
            models[name] = {"per_budget": per_budget, "crossover_shots": cross, "crossover_where": where,
                            "v_first": per_budget[0]["v"], "v_last": per_budget[-1]["v"],
                            "v_stderr_first": v_se[0], "v_stderr_last": v_se[-1],
                            "model_floor_sq": floor["full" if name == "full" else "reduced"]}
        out.append({"readout": e, "tomography_bias_sq": bias2, "tomography_v": v_tomo, "tomography": tomo_rows,
                    "models": models})
    targets = []
    for row in out:
        if row["readout"] == 0.03 and n == 2:
            c = row["models"]["coherent+stochastic"]["crossover_shots"]
            targets.append({"n": n, "readout": 0.03, "target": "reduced-model crossover <= 1e7 shots",
                            "value": c, "limit": CROSSOVER_TARGET, "met": bool(c <= CROSSOVER_TARGET)})
    return {"config": _cfg_json(cfg), "n_qubits": n, "readouts": out, "targets": targets, "runs": ours_runs,
            "wall_seconds": t.wall}


SUBPARTS = ("side", "cross")


def run(size: str = "small", *, jobs: int = 1, subparts: tuple[str, ...] = SUBPARTS, previous: dict | None = None,
        raw=None, run_missing: bool = True) -> dict:
    """Both parts; a JSON-ready dict.

    ``subparts`` not listed are copied from ``previous`` (an earlier result of this function,
    e.g. from the JSON store), keeping their own ``finished`` stamp.
    """
    import datetime

    bad = [p for p in subparts if p not in SUBPARTS]
    if bad:
        raise ValueError(f"'subparts' must be among {list(SUBPARTS)}; got {bad}")
    out = {}
    for name in SUBPARTS:
        if name in subparts:
            out[name] = (run_side(size, jobs=jobs, raw=raw, run_missing=run_missing) if name == "side"
                         else run_cross(size, jobs=jobs))
            out[name]["finished"] = datetime.datetime.now().strftime("%Y-%m-%d %H:%M")
        elif previous is not None and name in previous:
            out[name] = sc.revive(previous[name])
        else:
            raise ValueError(f"sub-study {name!r} is neither run nor stored; run it (it is missing from the store)")
    return out


# ---- report ----------------------------------------------------------------------------------
def markdown(res: dict, *, figures: dict[str, str]) -> str:
    side, cross = res["side"], res["cross"]
    cfg = side["config"]
    out = ["### Accuracy per shot, side by side", ""]
    if side.get("finished"):
        out += [f"Measured {side['finished']}.", ""]
    out.append(
        "Same device for every method (error `random_channel(n, 0.1)` from a fixed seed after every "
        "Clifford, symmetric readout flip per qubit, perfect preparation) and the same total shots: "
        "those of the package's default plan (100 shots per sequence). Tomography: six Pauli "
        "eigenstate inputs per qubit, all Pauli bases, linear inversion and CPTP projection. "
        f"Benchmarking: {cfg['rb_sequences']} sequences per length, doubling lengths up to about "
        "`1/(1-p)`, 200 bootstrap replicates. Ours: `analyze(plan, counts, bootstrap=B, models=False, "
        "ranges=False, diamond=False)`; the diamond distance of the point estimate is computed "
        "afterwards. Errors are root mean squares over repeats; the infidelity is `1 - F_avg`; "
        "\"block\" is `||B_est - B_true||_F`; width is the mean width of the 95% fidelity interval "
        "(tomography has none); \"width / (3.92 rms err)\" is 1 when the interval is as wide as a normal "
        "95% interval of the actual error, and \"interval covers truth\" counts the repeats whose interval "
        "contains the true fidelity (a narrow interval is only a gain if it still covers). \"ours (decay)\" "
        "is the identity-probe decay alone.")
    out.append("")
    fps = {st["n"]: st.get("fidelity_plan") for st in side["settings"]}
    if any(fps.values()):
        desc = "; ".join(
            f"{n} qubit{'s' if n > 1 else ''}: lengths {', '.join(str(m) for m in fp['lengths'])} with "
            f"{', '.join(str(k) for k in fp['sequences'])} sequences" for n, fp in sorted(fps.items()) if fp)
        out.append(
            "\"ours, fidelity plan\": benchmarking's lengths are chosen from the true decay (doubling up to "
            "about `1/(1-p)`), so ours gets lengths chosen from the same information: the precision planner "
            "`robusttomo.planner.choose_plan` on `assumed_device(n, average_error=1 - F_avg, readout_error=0)` "
            "(the true average infidelity only, as benchmarking's rule uses only `p`), target: the standard "
            f"error of `average_gate_fidelity` ({sc.fmt(_PLANNER_TARGET)}, small enough that no length sits "
            "at the planner's floor), 100 shots per sequence, device time = shots. Its lengths and proportions "
            "are kept and the sequence counts scaled to the default plan's total, at least the planner's own "
            "floor of 50 per length (`choose_plan(min_sequences=50)`, its large-sample floor), so it spends the same shots "
            f"as the other three: {desc}. Same analysis call as the default plan"
            + (f", except for {', '.join(str(q) for q in cfg.get('fid_decay_only', ()))} qubits: there the decay fit "
               "alone (`estimate_decays`, same bootstrap seed, the bias-corrected interval `analyze` reports as "
               "`decay_fidelity`), since the reconstruction's bootstrap re-fits cost about 95 s CPU per repeat for "
               "this plan; wherever both were computed "
               f"({side.get('recon_vs_decay_repeats', 0)} repeats) the reconstruction's fidelity and interval width "
               f"equalled the decay's to {sc.fmt(side.get('recon_vs_decay_max_diff', float('nan')))}; its "
               "diamond and block errors are those of the CPTP point estimate of the same data "
               "(`analyze(bootstrap=0)`): the plan gives the whole channel too"
               if cfg.get("fid_decay_only") else "") + ".")
        out.append("")
    header = ["qubits", "readout", "method", "shots", "rms infidelity err", "mean infidelity err",
              "rms diamond err", "rms block err", "interval width", "width / (3.92 rms err)",
              "interval covers truth", "repeats"]
    rows = []
    for s in side["settings"]:
        for method, label in (("ours", "ours (reconstruction)"), ("ours_fid", "ours, fidelity plan"),
                              ("tomography", "tomography"), ("benchmarking", "standard RB")):
            if method not in s:
                continue
            m = s[method]
            rows.append([s["n"], f"{100 * s['readout']:g}%", label, m["shots"], m["rms_infidelity_error"],
                         m["mean_infidelity_error"], m["rms_diamond_error"], m["rms_block_error"],
                         m["mean_width"], m.get("width_over_rms", float("nan")),
                         f"{m['covered']}/{s['repeats']}" if "covered" in m else "-", s["repeats"]])
        for method, label in (("ours", "ours (decay)"), ("ours_fid", "ours, fidelity plan (decay)")):
            if method in s:
                m = s[method]
                rows.append([s["n"], f"{100 * s['readout']:g}%", label, m["shots"],
                             m["rms_decay_infidelity_error"], float("nan"), float("nan"), float("nan"),
                             m["mean_decay_width"],
                             m["mean_decay_width"] / (2 * 1.96 * m["rms_decay_infidelity_error"]),
                             f"{m['decay_covered']}/{s['repeats']}" if "decay_covered" in m else "-", s["repeats"]])
    out.append(sc.md_table(header, rows))
    out.append("")
    imp = sorted({i for st in side["settings"] for i in st.get("imported", [])})
    if imp:
        out.append("Default plan, tomography and standard RB: these repeats are a deterministic function of "
                   "their task (seeds included), and were taken from the stored results of " + "; ".join(imp)
                   + " (`study_accuracy.import_stored`) instead of being recomputed; the fidelity-plan repeats "
                   "are new. Code of the repeats: " + ", ".join(sorted({c for st in side["settings"]
                                                                        for c in st.get("codes", [])})) + ".")
        out.append("")
    out.append("True values: " + "; ".join(
        f"{s['n']} qubit(s): infidelity {sc.fmt(s['true_infidelity'])}, diamond distance "
        f"{sc.fmt(s['true_diamond'])}, benchmarking lengths {s['rb_lengths'][0]}..{s['rb_lengths'][-1]}"
        for s in side["settings"] if s["readout"] == side["settings"][0]["readout"]) + ".")
    out.append("")
    out.append(sc.md_table(["qubits", "readout", "target", "measured ratio", "limit", "verdict"],
                           [[t["n"], f"{100 * t['readout']:g}%", t["target"], t["value"], t["limit"],
                             sc.verdict(t["met"])] for t in side["targets"]]))
    out.append("")
    crow = []
    for st in side["settings"]:
        if "ours_fid" not in st:
            continue
        o, of, rb = st["ours"], st["ours_fid"], st["benchmarking"]
        cov = (lambda m: f"{m['covered']}/{st['repeats']}" if "covered" in m else "-")
        crow.append([st["n"], f"{100 * st['readout']:g}%", o["mean_width"] / rb["mean_width"],
                     of["mean_width"] / rb["mean_width"],
                     o["rms_infidelity_error"] / rb["rms_infidelity_error"],
                     of["rms_infidelity_error"] / rb["rms_infidelity_error"],
                     o["mean_width"] / (3.92 * o["rms_infidelity_error"]),
                     of["mean_width"] / (3.92 * of["rms_infidelity_error"]),
                     rb["mean_width"] / (3.92 * rb["rms_infidelity_error"]), cov(of), cov(rb)])
    if crow:
        out.append("The width target read together with the actual errors: a width ratio is only a gain in "
                   "precision if the intervals are honest. \"width / (3.92 rms)\" is 1 for an interval as wide "
                   "as a normal 95% interval of the actual error (below 1: narrower than the errors warrant); the "
                   "rms ratio compares the actual errors, whatever the intervals say.")
        out.append("")
        out.append(sc.md_table(["qubits", "readout", "width ratio, default plan / RB", "width ratio, fidelity plan / RB",
                                "rms ratio, default / RB", "rms ratio, fidelity plan / RB",
                                "width / (3.92 rms), default", "width / (3.92 rms), fidelity plan",
                                "width / (3.92 rms), RB", "covers truth, fidelity plan", "covers truth, RB"], crow))
        out.append("")
        for method, label in (("ours_fid", "fidelity plan"), ("ours", "default plan"), ("benchmarking", "standard RB")):
            have = [st for st in side["settings"] if method in st and "covered" in st[method]]
            if have and len(have) == len(side["settings"]):
                hits = sum(st[method]["covered"] for st in have)
                trials = sum(st["repeats"] for st in have)
                lo, hi = sc.clopper_pearson(hits, trials)
                out.append(f"Pooled over every setting, the {label}'s 95% interval covered the true fidelity in "
                           f"{hits} of {trials} repeats ({sc.fmt(hits / trials)}, exact 95% interval {sc.fmt(lo)} to "
                           f"{sc.fmt(hi)}).")
                out.append("")
    if "accuracy" in figures:
        out.append(f"![accuracy per shot]({figures['accuracy']})")
        out.append("")
    n = cross["n_qubits"]
    out.append(f"### Crossover budget of the unital block ({n} qubit{'s' if n > 1 else ''})")
    out.append("")
    if cross.get("finished"):
        out += [f"Measured {cross['finished']}.", ""]
    out.append(
        "Device: the coherent+stochastic error of `study_common.generator_error` (inside the reduced "
        "model), symmetric readout flips. Tomography's mean squared block error is `bias^2 + v_tomo/N`: "
        "`bias^2` from exact probabilities (`total_shots=None`), `v_tomo = N * mean ||B_N - B_exact||^2` "
        f"from {cross['config']['tomo_repeats']} repeats at each budget of a grid (averaged over budgets "
        ">= 1e6, where the 1/N law holds). Ours has no SPAM bias; its mean squared error is measured by "
        f"{cross['config']['repeats']} repeats at each of "
        f"{', '.join(str(100 * s) for s in cross['config']['sequences'])} total shots (100 shots per "
        "sequence, `analyze(..., bootstrap=0)`; the reduced model is `fit_generator_model` on the same "
        "decays) and summarized as `v = N * MSE`. The crossover `N*` is where our error meets "
        "tomography's: interpolated between measured budgets, or, outside them, extrapolated with "
        "`MSE = v/N` from the nearest budget (`N* = (v - v_tomo) / bias^2`, 0 if `v <= v_tomo`); "
        "\"where\" says which. \"model floor\" is the squared block error of the model fitted to "
        "noise-free observations (zero when the truth lies in the model).")
    out.append("")
    rows = []
    for r in cross["readouts"]:
        for name, m in r["models"].items():
            rows.append([f"{100 * r['readout']:g}%", name, r["tomography_bias_sq"], r["tomography_v"],
                         " / ".join(sc.fmt(p["mse"]) for p in m["per_budget"]),
                         " / ".join(sc.fmt(p["v"]) for p in m["per_budget"]), m["model_floor_sq"],
                         m["crossover_shots"], _where(m)])
    out.append(sc.md_table(["readout", "our model", "tomography bias^2", "v_tomo", "our MSE per budget",
                            "our v per budget", "model floor", "crossover N*", "where"], rows))
    out.append("")
    if cross["targets"]:
        out.append(sc.md_table(["qubits", "readout", "target", "measured", "limit", "verdict"],
                               [[t["n"], f"{100 * t['readout']:g}%", t["target"], t["value"], t["limit"],
                                 sc.verdict(t["met"])] for t in cross["targets"]]))
        out.append("")
    if "crossover" in figures:
        out.append(f"![crossover]({figures['crossover']})")
        out.append("")
    return "\n".join(out)


def plot(res: dict, directory, *, rel: str, suffix: str = "") -> dict[str, str]:
    """Two PNGs: RMS infidelity error per method, and squared block error against shots."""
    from pathlib import Path

    plt = sc.pyplot()
    directory = Path(directory)
    figs = {}
    side = res["side"]
    qubits = sorted({s["n"] for s in side["settings"]})
    fig, axes = plt.subplots(1, len(qubits), figsize=(5 * len(qubits), 3.6), squeeze=False)
    for ax, n in zip(axes[0], qubits):
        sel = [s for s in side["settings"] if s["n"] == n]
        x = np.arange(len(sel))
        methods = [(m, lab) for m, lab in (("ours", "ours, default plan"), ("ours_fid", "ours, fidelity plan"),
                                            ("tomography", "tomography"), ("benchmarking", "standard RB"))
                   if m in sel[0]]
        bw = 0.8 / len(methods)
        for k, (method, label) in enumerate(methods):
            ax.bar(x + (k - (len(methods) - 1) / 2) * bw, [s[method]["rms_infidelity_error"] for s in sel], bw,
                   label=label)
        ax.set_xticks(x, [f"{100 * s['readout']:g}%" for s in sel])
        ax.set_yscale("log")
        ax.set_xlabel("readout error per qubit")
        ax.set_ylabel("rms error of the infidelity")
        ax.set_title(f"{n} qubit{'s' if n > 1 else ''}, {sel[0]['ours']['shots']} shots")
        ax.legend(fontsize=8)
    fig.tight_layout()
    sc.save_figure(fig, directory / f"study_accuracy{suffix}.png")
    plt.close(fig)
    figs["accuracy"] = f"{rel}/study_accuracy{suffix}.png"

    cross = res["cross"]
    fig, axes = plt.subplots(1, len(cross["readouts"]), figsize=(5 * len(cross["readouts"]), 3.8), squeeze=False)
    for ax, r in zip(axes[0], cross["readouts"]):
        tn = np.array([t["shots"] for t in r["tomography"]], dtype=float)
        ax.loglog(tn, [t["mse"] for t in r["tomography"]], "o", color="C1", label="tomography (measured)")
        grid = np.logspace(np.log10(min(tn.min(), 1e3)), np.log10(max(tn.max(), 1e9)), 100)
        ax.loglog(grid, r["tomography_bias_sq"] + r["tomography_v"] / grid, "-", color="C1", lw=1)
        for k, (name, m) in enumerate(r["models"].items()):
            col = f"C{0 if k == 0 else 2}"
            ax.loglog([p["shots"] for p in m["per_budget"]], [p["mse"] for p in m["per_budget"]], "s", color=col,
                      label=f"ours, {name} (measured)")
            ax.loglog(grid[grid <= m["per_budget"][0]["shots"]],
                      m["v_first"] / grid[grid <= m["per_budget"][0]["shots"]], ":", color=col, lw=1)
            ax.loglog(grid[grid >= m["per_budget"][-1]["shots"]],
                      m["v_last"] / grid[grid >= m["per_budget"][-1]["shots"]], ":", color=col, lw=1)
            c = m["crossover_shots"]
            if np.isfinite(c) and c > 0:
                ax.axvline(c, color=col, lw=0.6, ls=":")
        ax.set_xlabel("total shots N")
        ax.set_ylabel("mean squared error of the unital block")
        ax.set_title(f"{cross['n_qubits']} qubits, readout {100 * r['readout']:g}%")
        ax.legend(fontsize=7)
    fig.tight_layout()
    sc.save_figure(fig, directory / f"study_crossover{suffix}.png")
    plt.close(fig)
    figs["crossover"] = f"{rel}/study_crossover{suffix}.png"
    return figs


def main(argv: list[str] | None = None) -> int:
    import json
    from pathlib import Path

    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--size", choices=sc.SIZES, default="small")
    ap.add_argument("--jobs", type=int, default=1)
    ap.add_argument("--import-stored", type=Path, default=None, metavar="JSON",
                    help="copy the side-by-side repeats stored in this results file into the checkpoint of --raw, "
                         "then exit")
    ap.add_argument("--raw", type=Path, default=None, help="checkpoint directory")
    args = ap.parse_args(argv)
    if args.import_stored is not None:
        if args.raw is None:
            ap.error("--import-stored needs --raw")
        args.raw.mkdir(parents=True, exist_ok=True)
        store = json.loads(args.import_stored.read_text(encoding="utf-8"))
        k = import_stored(args.size, store, args.raw, label=f"{args.import_stored.name}, key {args.size}")
        print(f"imported {k} repeats into {args.raw}")
        return 0
    res = run(args.size, jobs=args.jobs)
    print(markdown(res, figures={}))
    return 0


if __name__ == "__main__":
    sys.exit(main())
