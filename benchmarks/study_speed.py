"""Speed and scaling of the analysis, with a numpy-only floor for the hot path.

Run from the repository root (``run_all.py`` runs it as part of the study, after the other
studies, so that nothing of ours runs beside it)::

    python benchmarks/study_speed.py [--size smoke|small|full]

1. **Scaling grid.**  For one and two qubits (three in the full study: correlations and decay
   fit only), total sequences from 100 to 10,000 over the default lengths
   (:func:`study_common.split_sequences`), and the minimal or overcomplete probe set
   (:func:`robusttomo.default_probes`), each stage is timed on its own, in one process, after a
   warm-up that builds the Clifford tables and the probe set:

   * ``correlations``: :func:`robusttomo.estimate.compute_correlations`;
   * ``fit``: :func:`robusttomo.fit.fit_decays` without bootstrap;
   * ``convex``: building a :class:`robusttomo.reconstruct.CptpFitter` and one ``fit()``;
   * ``bootstrap``: the decay bootstrap (``fit_decays(bootstrap=B)`` minus the plain fit) and
     the CPTP re-fit of every replicate (``CptpFitter.fit_replicates``).

   Peak memory is the ``tracemalloc`` peak of correlations plus fit, measured in a second,
   traced pass (tracing slows allocation, so it is not timed); the process's peak resident
   size is reported too.

2. **Floor.**  The bare batched matrix products the correlations need, with the same shapes
   (per length: the sequences, the probes kept at that length, ``d*d``-dimensional Pauli
   vectors), timed with numpy alone on preallocated arrays in the most favourable memory
   layout for each product: at ``m = 2`` one GEMM ``(K, D) x (D, P*D)`` and two batched
   matrix-vector products; at ``m >= 3``, ``m - 1`` probe steps ``(Q, d2, d2) x (Q, d2, K)``
   and ``m - 1`` Clifford steps ``(K, d2, d2) x (K, d2, Q)``, then the readout GEMM and two
   batched matrix-vector products.  Layout changes between the steps, Clifford look-ups and
   everything else are left out, so this is a lower bound.  Reported: our correlation time
   divided by the floor, both timed in :data:`FLOOR_ROUNDS` alternating rounds (so that a
   change of load hits both), each timing the best of as many calls as fit into
   :data:`TIMING_BUDGET_S` (at least three), the best of every round kept.

3. **Headline.**  The two-qubit full analysis (225 probes, 2,000 sequences, 200 bootstrap
   replicates, every option at its default: models, ranges, diamond distance) timed end to
   end with :func:`robusttomo.analyze`, its stages split by the ``progress`` callback.  The
   small study runs it with fewer replicates and reports the replicate cost measured there.
"""

from __future__ import annotations

import study_common as sc  # first: pins BLAS threads before numpy loads

import argparse  # noqa: E402
import sys  # noqa: E402
import time  # noqa: E402
import warnings  # noqa: E402

import numpy as np  # noqa: E402

CONFIG: dict[str, dict] = {
    "smoke": {"grid": [(1, 100, "minimal")], "bootstrap": 5, "headline": None, "profile": False},
    "small": {
        "grid": [(n, s, p) for n in (1, 2) for s in (100, 1000) for p in ("minimal", "overcomplete")],
        "bootstrap": 10,
        "headline": {"n": 2, "sequences": 2000, "bootstrap": 20},
        "profile": False,
    },
    "full": {
        "grid": [(n, s, p) for n in (1, 2) for s in (100, 1000, 10000) for p in ("minimal", "overcomplete")]
        + [(3, 100, "minimal"), (3, 1000, "minimal")],
        "bootstrap": 50,
        "headline": {"n": 2, "sequences": 2000, "bootstrap": 200},
        "profile": True,
    },
}
HEADLINE_TARGET_S = 30.0
FLOOR_RATIO_TARGET = 3.0
# three qubits: the convex program (a 128 x 128 real PSD constraint over 4032 variables) is not
# attempted in the grid
CONVEX_MAX_QUBITS = 2


def _experiment(n: int, sequences: int, seed: int):
    import robusttomo as rt
    from robusttomo.plan import default_lengths

    lengths = default_lengths(n)
    plan = rt.make_plan(n_qubits=n, lengths=lengths, sequences=sc.split_sequences(sequences, lengths), seed=seed)
    dev = sc.device(n, sc.general_error(n), 0.02)
    return plan, rt.simulate(plan, dev, seed=seed + 1)


#: Seconds of calls each timing of the floor comparison spends at least (small sizes take
#: a sub-millisecond call, where a best of three is mostly timer and cache noise).
TIMING_BUDGET_S = 0.05
#: Alternating rounds of (our correlations, the floor) whose best times make the floor ratio.
FLOOR_ROUNDS = 5


def _best(fn, repeats: int = 3, budget: float | None = None) -> float:
    """Best wall time of ``repeats`` calls; with ``budget``, as many more calls (at most 500)
    as fit into ``budget`` seconds at the first call's time."""
    best = float("inf")
    k = 0
    while k < repeats:
        t0 = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
        k += 1
        if k == 1 and budget is not None and best > 0:
            repeats = max(repeats, min(500, int(budget / best)))
    return best


def floor_seconds(corr, budget: float | None = TIMING_BUDGET_S) -> dict[str, float]:
    """Time of the bare batched products the correlations of ``corr`` need (numpy only).

    Same shapes as :func:`robusttomo.estimate.compute_correlations` uses for these data (the
    probe counts per length are read from ``corr``); random operands; best of at least three
    calls per length, more when they fit into ``budget`` seconds (:func:`_best`).
    """
    rng = np.random.default_rng(0)
    n = corr.n_qubits
    d, d2 = 2**n, 4**n
    dd = d2 - 1
    p = corr.probes.n_probes
    total = 0.0
    parts = {}
    for s in corr.stats:
        k, m = s.values.shape[0], s.length
        if m == 1:
            continue
        if m == 2:
            v = rng.standard_normal((k, dd))
            bmat = rng.standard_normal((dd, p * dd))
            u = rng.standard_normal((k, dd, 1))
            bv = np.empty((k, p * dd))
            out = np.empty((k, p, 1))

            def m2() -> None:
                np.matmul(v, bmat, out=bv)
                b3 = bv.reshape(k, p, dd)
                np.matmul(b3, u, out=out)
                np.matmul(b3, u, out=out)

            t = _best(m2, budget=budget)
        else:
            q = s.probes.size
            probe_ops = rng.standard_normal((q, d2, d2))
            r_q = rng.standard_normal((q, d2, k))
            o_q = np.empty_like(r_q)
            steps = rng.standard_normal((k, d2, d2))
            r_k = rng.standard_normal((k, d2, q))
            o_k = np.empty_like(r_k)
            zt = rng.standard_normal((d2, d))
            flat = rng.standard_normal((k * q, d2))
            probs = np.empty((k * q, d))
            w = rng.standard_normal((k, d, 1))
            fo = np.empty((k, q, 1))

            def prop() -> None:
                for _ in range(m - 1):
                    np.matmul(probe_ops, r_q, out=o_q)
                    np.matmul(steps, r_k, out=o_k)
                np.matmul(flat, zt, out=probs)
                pq = probs.reshape(k, q, d)
                np.matmul(pq, w, out=fo)
                np.matmul(pq, w, out=fo)

            t = _best(prop, budget=budget)
        parts[f"m={m}"] = t
        total += t
    parts["total"] = total
    return parts


def _grid_point(n: int, sequences: int, probes_kind: str, bootstrap: int) -> dict:
    from robusttomo import reconstruct as rc
    from robusttomo.estimate import compute_correlations, default_probes
    from robusttomo.fit import fit_decays

    probes = default_probes(n, overcomplete=probes_kind == "overcomplete")
    plan, counts = _experiment(n, sequences, seed=40_000 + 100 * n + sequences % 97)
    out: dict[str, object] = {"n": n, "sequences": int(sum(b.n_sequences for b in plan.blocks)),
                              "probes": probes.n_probes, "probe_set": probes_kind, "bootstrap": bootstrap}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        tc = sc.timed(lambda: compute_correlations(plan, counts, probes=probes))
        corr = tc.value
        tf = sc.timed(lambda: fit_decays(corr, bootstrap=0))
        fit_s = min(tf.wall, _best(lambda: fit_decays(corr, bootstrap=0), 2))
        tb = sc.timed(lambda: fit_decays(corr, bootstrap=bootstrap, seed=1)) if bootstrap else None
        out["correlations_s"] = min(tc.wall, _best(lambda: compute_correlations(plan, counts, probes=probes), 2))
        out["fit_s"] = fit_s
        out["decay_bootstrap_s"] = max(tb.wall - fit_s, 0.0) if tb else float("nan")
        out["kept_probes_per_length"] = {int(s.length): int(s.probes.size) for s in corr.stats}
        if n <= CONVEX_MAX_QUBITS:
            dec = tb.value if tb else tf.value
            obs = dec.observations()
            tx = sc.timed(lambda: rc.CptpFitter(obs))
            fitter = tx.value
            t1 = sc.timed(fitter.fit)
            out["convex_build_s"] = tx.wall
            out["convex_s"] = tx.wall + t1.wall
            out["convex_solver"] = t1.value.solver
            if tb:
                tr = sc.timed(lambda: fitter.fit_replicates(obs.replicates))
                out["convex_bootstrap_s"] = tr.wall
                out["convex_fallbacks"] = int(sum(1 for f in tr.value if f.fell_back))
            else:
                out["convex_bootstrap_s"] = float("nan")
        else:
            out["convex_s"] = out["convex_bootstrap_s"] = float("nan")
        # the floor ratio: our correlations and the floor timed in alternating rounds, best of each
        ours, fl = float("inf"), {"total": float("inf")}
        for _ in range(FLOOR_ROUNDS):
            ours = min(ours, _best(lambda: compute_correlations(plan, counts, probes=probes), budget=TIMING_BUDGET_S))
            f = floor_seconds(corr)
            fl = f if f["total"] < fl["total"] else fl
        out["correlations_best_s"] = ours
        out["floor_s"] = fl["total"]
        out["floor_parts_s"] = fl
        out["floor_ratio"] = ours / fl["total"] if fl["total"] > 0 else float("nan")
        peak, _ = sc.traced_peak(lambda: fit_decays(compute_correlations(plan, counts, probes=probes), bootstrap=0))
        out["peak_traced_mb"] = peak
    out["max_rss_mb"] = sc.max_rss_mb()
    b = bootstrap or 1
    out["per_replicate_s"] = ((out["decay_bootstrap_s"] + out["convex_bootstrap_s"]) / b
                              if bootstrap else float("nan"))
    return out


def headline(n: int, sequences: int, bootstrap: int) -> dict:
    """The full analysis, timed end to end, split into stages by the progress callback."""
    import robusttomo as rt

    plan, counts = _experiment(n, sequences, seed=77_000)
    marks: list[tuple[str, int, int, float]] = []
    t0 = time.perf_counter()

    def progress(stage: str, done: int, total: int) -> None:
        marks.append((stage, done, total, time.perf_counter() - t0))

    t0 = time.perf_counter()
    rec = rt.analyze(plan, counts, bootstrap=bootstrap, seed=5, progress=progress)
    total = time.perf_counter() - t0
    # stage boundaries: each stage ticks (stage, 0, k) first and (stage, k, k) last, except the
    # bootstrap, which ticks once per replicate after the CPTP re-fits of all replicates
    first: dict[str, float] = {}
    last: dict[str, float] = {}
    for stage, _, _, t in marks:
        first.setdefault(stage, t)
        last[stage] = t
    order = [s for s in ("correlations", "decay fit", "convex fit", "ranges", "bootstrap", "models") if s in first]
    stages = {}
    prev_end = 0.0
    for s in order:
        if s == "bootstrap":
            # from the end of the previous stage to the first tick: CPTP re-fits of every replicate
            # (and the figures of the first one); the ticks after: the other replicates' figures
            # (with the diamond distance only when analyze() needs it per replicate)
            ticks = [t for st, _, _, t in marks if st == "bootstrap"]
            stages["bootstrap: CPTP re-fits"] = ticks[0] - prev_end
            stages["bootstrap: figures of merit of every replicate"] = ticks[-1] - ticks[0]
        else:
            stages[s] = last[s] - prev_end
        prev_end = last[s]
    stages["rest (point figures, intervals, assembly)"] = total - prev_end
    # the same analysis on the 2 cores the target names: its independent parts in 2 processes
    # (same results, docs/method-analysis.md "Parallel parts"); total wall time only
    t1 = time.perf_counter()
    rt.analyze(plan, counts, bootstrap=bootstrap, seed=5, jobs=2)
    jobs2 = time.perf_counter() - t1
    # with fewer than 200 replicates: add the missing replicates at the cost measured per replicate
    # (in one process; with jobs=2 they are shared by the two processes), the rest does not scale
    per_rep = ((stages.get("bootstrap: CPTP re-fits", 0.0) + stages.get("bootstrap: figures of merit of every replicate", 0.0))
               / bootstrap) if bootstrap > 0 else 0.0
    missing = max(200 - bootstrap, 0) if bootstrap > 0 else 0
    return {"n": n, "sequences": int(sum(b.n_sequences for b in plan.blocks)), "probes": rec.decays.probes.n_probes,
            "bootstrap": bootstrap, "wall_s": total, "jobs2_wall_s": jobs2, "stages_s": stages, "solver": rec.solver,
            "fell_back": rec.solver_fell_back, "warnings": list(rec.warnings),
            "extrapolated_200_s": total + missing * per_rep,
            "jobs2_extrapolated_200_s": jobs2 + missing * per_rep / 2}


def _top_functions(pr, top: int) -> list[dict]:
    import pstats

    st = pstats.Stats(pr)
    rows = []
    for (file, line, func), (cc, nc, tt, ct, _) in st.stats.items():  # type: ignore[attr-defined]
        rows.append({"function": f"{file.split('site-packages/')[-1].split('/work/main/')[-1]}:{line}({func})",
                     "calls": nc, "own_s": tt, "cumulative_s": ct})
    rows.sort(key=lambda r: -r["own_s"])
    return rows[:top]


def profile_correlations(n: int, sequences: int, probes_kind: str, *, top: int = 8) -> dict:
    """cProfile of one correlations call: where the time goes beyond the matrix products."""
    import cProfile

    from robusttomo.estimate import compute_correlations, default_probes

    probes = default_probes(n, overcomplete=probes_kind == "overcomplete")
    plan, counts = _experiment(n, sequences, seed=40_000 + 100 * n + sequences % 97)
    pr = cProfile.Profile()
    pr.enable()
    compute_correlations(plan, counts, probes=probes)
    pr.disable()
    return {"n": n, "sequences": sequences, "probes": probes.n_probes, "top": _top_functions(pr, top)}


def profile_headline(n: int, sequences: int, bootstrap: int, *, top: int = 12) -> list[dict]:
    """cProfile of a (shorter) full analysis: the functions with the largest own time."""
    import cProfile

    import robusttomo as rt

    plan, counts = _experiment(n, sequences, seed=77_000)
    pr = cProfile.Profile()
    pr.enable()
    rt.analyze(plan, counts, bootstrap=bootstrap, seed=5)
    pr.disable()
    return _top_functions(pr, top)


def run(size: str = "small", *, jobs: int = 1) -> dict:
    """The whole speed study in this process (``jobs`` is ignored: timings run alone)."""
    from robusttomo.estimate import default_probes

    cfg = CONFIG[sc.check_size(size)]
    t_all = time.perf_counter()
    warm = {}
    for n in sorted({g[0] for g in cfg["grid"]}):
        for kind in sorted({g[2] for g in cfg["grid"] if g[0] == n}):
            warm[f"{n} qubit(s), {kind} probes"] = sc.timed(
                lambda: default_probes(n, overcomplete=kind == "overcomplete")).wall
        _grid_point(n, 100, "minimal", 0)  # warm-up: Clifford tables, cvxpy import, first compile
    grid = [_grid_point(n, s, p, cfg["bootstrap"]) for n, s, p in cfg["grid"]]
    head = prof = None
    if cfg["headline"] is not None:
        h = cfg["headline"]
        head = headline(h["n"], h["sequences"], h["bootstrap"])
        if cfg["profile"]:
            prof = profile_headline(h["n"], h["sequences"], min(h["bootstrap"], 20))
    big = max((g for g in cfg["grid"] if g[0] <= 2), key=lambda g: (g[0], g[1], g[2] == "overcomplete"))
    corr_prof = profile_correlations(*big)
    targets = []
    for g in grid:
        targets.append({"target": f"correlations within 3x of the numpy floor ({g['n']}q, {g['sequences']} seq, "
                                  f"{g['probes']} probes)", "value": g["floor_ratio"], "limit": FLOOR_RATIO_TARGET,
                        "met": bool(g["floor_ratio"] <= FLOOR_RATIO_TARGET)})
    if head is not None:
        measured_200 = head["bootstrap"] >= 200
        targets.append({"target": "two-qubit full analysis (225 probes, 2000 sequences, 200 replicates) < 30 s "
                                  "on 2 cores (jobs=2)"
                                  + ("" if measured_200 else " (scaled from the replicates run)"),
                        "value": head["jobs2_extrapolated_200_s"], "limit": HEADLINE_TARGET_S,
                        "met": bool(head["jobs2_extrapolated_200_s"] < HEADLINE_TARGET_S)})
    return {"config": {"grid": cfg["grid"], "bootstrap": cfg["bootstrap"], "headline": cfg["headline"]},
            "probe_set_build_s": warm, "grid": grid, "headline": head, "profile": prof,
            "correlations_profile": corr_prof, "targets": targets,
            "wall_seconds": time.perf_counter() - t_all, "machine": sc.machine()}


# ---- report ----------------------------------------------------------------------------------
def markdown(res: dict, *, figures: dict[str, str]) -> str:
    out = ["### Speed and scaling", ""]
    out.append(
        "Wall seconds on the machine below, one process, `OMP_NUM_THREADS=1`, after a warm-up. Device: "
        "`random_channel(n, 0.1)`, 2% readout, 100 shots per sequence, default lengths. "
        f"Bootstrap columns use B = {res['config']['bootstrap']} replicates; \"per replicate\" is the decay "
        "plus CPTP cost of one replicate. \"floor\" is the numpy-only time of the batched matrix products "
        "the correlations need (see `benchmarks/study_speed.py`); \"corr / floor\" divides our correlation "
        f"time by it, both the best over {FLOOR_ROUNDS} alternating rounds of as many calls as fit into "
        f"{TIMING_BUDGET_S:g} s (at least three) (\"correlations\" is the stage time of the same pass as the "
        "other stages, best of three); \"peak MB\" is the tracemalloc peak of correlations plus fit.")
    out.append("")
    rows = []
    for g in res["grid"]:
        rows.append([g["n"], g["sequences"], g["probes"], g["correlations_s"], g["fit_s"], g["convex_s"],
                     g["decay_bootstrap_s"], g["convex_bootstrap_s"], g["per_replicate_s"], g["floor_s"],
                     g["floor_ratio"], g["peak_traced_mb"]])
    out.append(sc.md_table(["qubits", "sequences", "probes", "correlations", "fit", "convex", "decay bootstrap",
                            "CPTP bootstrap", "per replicate", "floor", "corr / floor", "peak MB"], rows))
    out.append("")
    out.append("Probe-set construction on first use (cached per process): " + "; ".join(
        f"{k}: {sc.fmt(v)} s" for k, v in res["probe_set_build_s"].items()) + ". Peak resident size of the "
        f"process: {sc.fmt(max(g['max_rss_mb'] for g in res['grid']))} MB.")
    out.append("")
    h = res["headline"]
    if h is not None:
        out.append(f"Headline: `analyze(plan, counts, bootstrap={h['bootstrap']}, seed=5)` with every other option at "
                   f"its default (models, ranges, diamond distance), {h['n']} qubits, {h['probes']} probes, "
                   f"{h['sequences']} sequences: **{sc.fmt(h['wall_s'])} s** in one process (solver {h['solver']}"
                   f"{', fell back' if h['fell_back'] else ''}), **{sc.fmt(h['jobs2_wall_s'])} s** with `jobs=2` "
                   "(its independent parts in two processes, identical results; the target's 2 cores)."
                   + ("" if h["bootstrap"] >= 200 else
                      f" With 200 replicates, at the replicate cost measured here: about "
                      f"**{sc.fmt(h['extrapolated_200_s'])} s** in one process and "
                      f"**{sc.fmt(h['jobs2_extrapolated_200_s'])} s** with `jobs=2` (the missing replicates "
                      "shared by the two processes; an estimate, not a measurement)."))
        out.append("")
        out.append(sc.md_table(["stage", "seconds"], [[k, v] for k, v in h["stages_s"].items()]))
        out.append("")
    cp_ = res["correlations_profile"]
    out.append(f"Where the correlation time goes ({cp_['n']} qubits, {cp_['sequences']} sequences, {cp_['probes']} "
               "probes; cProfile, largest own times):")
    out.append("")
    out.append(sc.md_table(["function", "calls", "own s", "cumulative s"],
                           [[p["function"].replace("|", "/"), p["calls"], p["own_s"], p["cumulative_s"]]
                            for p in cp_["top"]]))
    out.append("")
    if res["profile"]:
        out.append("Largest own times in a profiled run of the same analysis (cProfile, "
                   f"{min(h['bootstrap'], 20) if h else '?'} replicates):")
        out.append("")
        out.append(sc.md_table(["function", "calls", "own s", "cumulative s"],
                               [[p["function"].replace("|", "/"), p["calls"], p["own_s"], p["cumulative_s"]]
                                for p in res["profile"]]))
        out.append("")
    out.append(sc.md_table(["target", "measured", "limit", "verdict"],
                           [[t["target"], t["value"], t["limit"], sc.verdict(t["met"])] for t in res["targets"]]))
    out.append("")
    if "speed" in figures:
        out.append(f"![speed]({figures['speed']})")
        out.append("")
    return "\n".join(out)


def plot(res: dict, directory, *, rel: str, suffix: str = "") -> dict[str, str]:
    """One PNG: stage times against the number of sequences, per qubit count and probe set."""
    from pathlib import Path

    plt = sc.pyplot()
    qubits = sorted({g["n"] for g in res["grid"]})
    fig, axes = plt.subplots(1, len(qubits), figsize=(5 * len(qubits), 3.8), squeeze=False)
    for ax, n in zip(axes[0], qubits):
        for kind, ls in (("minimal", "-"), ("overcomplete", "--")):
            sel = sorted([g for g in res["grid"] if g["n"] == n and g["probe_set"] == kind], key=lambda g: g["sequences"])
            if not sel:
                continue
            x = [g["sequences"] for g in sel]
            for key, col, lab in (("correlations_s", "C0", "correlations"), ("fit_s", "C1", "fit"),
                                  ("convex_s", "C2", "convex"), ("floor_s", "C7", "numpy floor")):
                y = [g[key] for g in sel]
                if all(np.isfinite(v) for v in y):
                    ax.loglog(x, y, ls, color=col, marker="o", ms=3, label=f"{lab} ({kind})")
        ax.set_xlabel("sequences")
        ax.set_ylabel("wall seconds")
        ax.set_title(f"{n} qubit{'s' if n > 1 else ''}")
        ax.legend(fontsize=6)
    fig.tight_layout()
    sc.save_figure(fig, Path(directory) / f"study_speed{suffix}.png")
    plt.close(fig)
    return {"speed": f"{rel}/study_speed{suffix}.png"}


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--size", choices=sc.SIZES, default="small")
    args = ap.parse_args(argv)
    print(markdown(run(args.size), figures={}))
    return 0


if __name__ == "__main__":
    sys.exit(main())
