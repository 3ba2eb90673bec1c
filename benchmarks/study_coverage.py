"""Do the intervals mean what they say: coverage, and bias under gate-dependent noise.

Run from the repository root (``run_all.py`` runs it as part of the study)::

    python benchmarks/study_coverage.py [--size smoke|small|full] [--jobs 2]

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
        "coverage": {"qubits": (1,), "experiments": {1: 2}, "bootstrap": {1: 10}, "ranges": {1: False},
                     "sequences": {1: 120}},
        "gate": {"qubits": (1,), "repeats": 1, "sequences": {1: 120}},
    },
    "small": {
        "coverage": {"qubits": (1, 2), "experiments": {1: 12, 2: 2}, "bootstrap": {1: 50, 2: 20},
                     "ranges": {1: True, 2: False}, "sequences": {1: None, 2: None}},
        "gate": {"qubits": (1, 2), "repeats": 2, "sequences": {1: None, 2: None}},
    },
    "full": {
        "coverage": {"qubits": (1, 2), "experiments": {1: 200, 2: 100}, "bootstrap": {1: 200, 2: 200},
                     "ranges": {1: True, 2: True}, "sequences": {1: None, 2: None}},
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
    out = {"n": n, "seed": seed, "seconds": w.wall, "warnings": list(rec.warnings)}
    for key, iv, truth in (("agf", f.average_gate_fidelity, true["agf"]), ("dd", f.diamond_distance, true["dd"]),
                           ("decay", f.decay_fidelity, true["agf"])):
        out[key] = {"value": iv.value, "low": iv.low, "high": iv.high, "covered": iv.contains(truth),
                    "error": iv.value - truth}
    span = f.diamond_distance_range
    out["dd_range"] = {"low": span.low, "high": span.high,
                       "covered": bool(span.low <= true["dd"] <= span.high) if np.isfinite(span.low) else None}
    return out


def run_coverage(size: str, *, jobs: int = 1) -> dict:
    from robusttomo import metrics

    cfg = CONFIG[sc.check_size(size)]["coverage"]
    tasks = [{"n": n, "seed": 2_000_000 + 100_000 * n + 10 * i, "bootstrap": cfg["bootstrap"][n],
              "ranges": cfg["ranges"][n], "sequences": cfg["sequences"][n]}
             for n in cfg["qubits"] for i in range(cfg["experiments"][n])]
    t = sc.timed(lambda: sc.run_tasks(_coverage_task, tasks, jobs=jobs))
    runs: list[dict] = t.value  # type: ignore[assignment]
    rows = []
    for n in cfg["qubits"]:
        err = coverage_device(n).error
        sel = [r for r in runs if r["n"] == n]
        row: dict[str, object] = {"n": n, "experiments": len(sel), "bootstrap": cfg["bootstrap"][n],
                                  "true_agf": metrics.average_gate_fidelity(err),
                                  "true_dd": metrics.diamond_distance(err),
                                  "mean_seconds": sc.mean([r["seconds"] for r in sel]),
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
        rows.append(row)
    targets = []
    for row in rows:
        for key, label in (("agf", "average gate fidelity"), ("dd", "diamond distance"), ("decay", "identity decay")):
            c = row[key]["coverage"]  # type: ignore[index]
            targets.append({"n": row["n"], "target": f"coverage of {label} in [93%, 97%]", "value": c,
                            "met": bool(COVERAGE_TARGET[0] <= c <= COVERAGE_TARGET[1])})
    return {"config": _cfg_json(cfg), "rows": rows, "targets": targets, "runs": runs, "wall_seconds": t.wall}


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


def run_gate(size: str, *, jobs: int = 1) -> dict:
    from robusttomo import metrics

    cfg = CONFIG[sc.check_size(size)]["gate"]
    strengths = (1.0, 3.0)
    tasks = [{"n": n, "strength": s, "control": c, "sequences": cfg["sequences"][n],
              "seed": 3_000_000 + 100_000 * n + 10_000 * int(s) + 1000 * int(c) + 10 * r}
             for n in cfg["qubits"] for s in strengths for c in (False, True) for r in range(cfg["repeats"])]
    t = sc.timed(lambda: sc.run_tasks(_gate_task, tasks, jobs=jobs))
    runs: list[dict] = t.value  # type: ignore[assignment]
    rows = []
    for n in cfg["qubits"]:
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


def run(size: str = "small", *, jobs: int = 1) -> dict:
    """Both parts; a JSON-ready dict."""
    return {"coverage": run_coverage(size, jobs=jobs), "gate": run_gate(size, jobs=jobs)}


# ---- report ----------------------------------------------------------------------------------
def markdown(res: dict, *, figures: dict[str, str]) -> str:
    cov, gate = res["coverage"], res["gate"]
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
    out.append("True values: " + "; ".join(
        f"{r['n']} qubit(s): F_avg {sc.fmt(r['true_agf'], 5)}, diamond distance {sc.fmt(r['true_dd'])}; "
        f"{sc.fmt(r['mean_seconds'])} s per analysis; {r['runs_with_warnings']} of {r['experiments']} runs warned"
        for r in cov["rows"]) + ".")
    out.append("")
    out.append(sc.md_table(["qubits", "target", "measured", "verdict"],
                           [[t["n"], t["target"], t["value"], sc.verdict(t["met"])] for t in cov["targets"]]))
    out.append("")
    if "coverage" in figures:
        out.append(f"![coverage]({figures['coverage']})")
        out.append("")
    out.append("### Bias under gate-dependent noise")
    out.append("")
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
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--size", choices=sc.SIZES, default="small")
    ap.add_argument("--jobs", type=int, default=1)
    args = ap.parse_args(argv)
    print(markdown(run(args.size, jobs=args.jobs), figures={}))
    return 0


if __name__ == "__main__":
    sys.exit(main())
