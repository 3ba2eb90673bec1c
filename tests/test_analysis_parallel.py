"""The analysis in parts: replicate groups, worker processes, and the single-process reference.

The parallel paths are checked against the plain serial computation (the slow, obviously
correct reference): the same analysis in one process, with every replicate in one group.
Equality is exact (same seeds, same solver starting points), not within a tolerance.  Where a
solver result is compared with an independent solve, the tolerance is the fit's own certified
bound (robusttomo.reconstruct.SolveResiduals), whose derivation is in
docs/method-reconstruction.md.
"""

from __future__ import annotations

import numpy as np
import pytest

from common_data import result_numbers  # shared test builders

import robusttomo as rt
from robusttomo import assess
from robusttomo import reconstruct as rc
from robusttomo.channels import amplitude_damping, depolarizing, rotation


def _one_qubit_run(*, interleave: str | None = None, seed: int = 1):
    err = rotation("Z", 0.05) @ amplitude_damping(0.02) @ depolarizing(1, 0.99)
    plan = rt.make_plan(n_qubits=1, lengths=[1, 2, 4, 8], sequences=60, shots=200, seed=seed, interleave=interleave)
    kw = {} if interleave is None else {"interleaved_error": depolarizing(1, 0.985)}
    dev = rt.Device.build(1, error=err, readout=[(0.02, 0.03)], prep_flip=[0.01], **kw)
    return plan, rt.simulate(plan, dev, seed=seed + 1)


def _prepare(plan, counts, *, bootstrap: int, ranges: bool = False, models: bool = False):
    return assess._prepare_analysis(plan, counts, target=None, reference=None, bootstrap=bootstrap, seed=7,
                                    probes=None, control_variate=True, models=models, ranges=ranges,
                                    diamond=True, solver="SCS", tick=lambda *a: None)


def _groups(prep, n_groups: int, *, fresh: bool) -> dict[str, np.ndarray]:
    out = []
    for a, b in assess._group_bounds(prep.bootstrap, n_groups):
        if fresh:  # as on another worker: no fitter built in this process yet
            assess._FITTERS.clear()
        out.append(assess._replicate_group(prep, a, b))
    return assess._merge_replicate_groups(out[::-1], prep.bootstrap)  # merge does not rely on order


def test_group_bounds_cover_every_replicate_once():
    for total in (1, 7, 200):
        for groups in (1, 2, 3, 8, 500):
            bounds = assess._group_bounds(total, groups)
            idx = np.concatenate([np.arange(a, b) for a, b in bounds])
            assert np.array_equal(idx, np.arange(total))
            assert len(bounds) == min(groups, total)
    assert assess._group_bounds(0, 4) == []


def test_fit_replicates_do_not_depend_on_their_order():
    plan, counts = _one_qubit_run()
    dec = rt.estimate_decays(plan, counts, bootstrap=6, seed=2)
    obs = dec.observations()
    fitter = rc.CptpFitter(obs)
    fitter.fit()
    before = fitter._solver_state()
    together = fitter.fit_replicates(obs.replicates)
    alone = [fitter.fit_replicates(obs.replicates[i:i + 1])[0] for i in reversed(range(6))][::-1]
    for a, b in zip(together, alone):
        assert np.array_equal(a.channel.ptm, b.channel.ptm)
    # the fitter is left as it was: the solver's starting point is the point fit's again
    after = fitter._solver_state()
    assert sorted(before) == sorted(after) and "fit" in before
    assert all(np.array_equal(before[k][v], after[k][v]) for k in before for v in ("x", "y", "s"))
    # an independent cold solve of each replicate agrees within the two certified bounds
    for fb, row in zip(together, obs.replicates):
        cold = rc.CptpFitter(obs).fit(row)
        bound = fb.residuals.block_error_bound + cold.residuals.block_error_bound
        assert np.linalg.norm(fb.unital_block - cold.unital_block) <= bound + 1e-12


@pytest.mark.parametrize("interleave", [None, "h"])
def test_replicate_groups_1_2_3_give_identical_arrays(interleave):
    plan, counts = _one_qubit_run(interleave=interleave)
    prep = _prepare(plan, counts, bootstrap=9)
    one = _groups(prep, 1, fresh=False)
    for n_groups in (2, 3):
        split = _groups(prep, n_groups, fresh=True)
        assert sorted(split) == sorted(one)
        for key in one:
            assert np.array_equal(one[key], split[key], equal_nan=True), key
    assert one["block"].shape == (9, 3, 3) and one["pauli"].shape == (9, 4)
    assert np.all(np.isfinite(one["agf"]))
    # and the assembled result is the one analyze() gives in one process
    parts = [assess._run_part(prep, ("point",)), {"part": ("replicates", 0, 9), "arrays": _groups(prep, 3, fresh=True)}]
    rec_groups = assess._assemble_analysis(prep, parts)
    rec = rt.analyze(plan, counts, bootstrap=9, seed=7, ranges=False, models=False)
    (a, rate_a), (b, rate_b) = result_numbers(rec), result_numbers(rec_groups)
    assert np.array_equal(a, b, equal_nan=True)
    np.testing.assert_allclose(rate_b, rate_a, rtol=0, atol=1e-15)


def test_merge_rejects_missing_or_repeated_replicates():
    plan, counts = _one_qubit_run()
    prep = _prepare(plan, counts, bootstrap=4)
    g1, g2 = assess._replicate_group(prep, 0, 2), assess._replicate_group(prep, 2, 4)
    with pytest.raises(ValueError, match="exactly once"):
        assess._merge_replicate_groups([g1], 4)
    with pytest.raises(ValueError, match="exactly once"):
        assess._merge_replicate_groups([g1, g2, g2], 4)
    with pytest.raises(ValueError, match="within"):
        assess._replicate_group(prep, 3, 5)


@pytest.mark.parametrize("force_forkserver", [False, True])
def test_analyze_with_two_workers_equals_one_process(force_forkserver, monkeypatch):
    plan, counts = _one_qubit_run(seed=5)
    kw = {"bootstrap": 12, "seed": 3}
    ref = rt.analyze(plan, counts, **kw)
    if force_forkserver:  # the start method used when this process has threads of its own
        monkeypatch.setattr(assess, "_single_threaded", lambda: False)
    ticks = []
    par = rt.analyze(plan, counts, jobs=2, progress=lambda *t: ticks.append(t), **kw)
    (a, rate_a), (b, rate_b) = result_numbers(ref), result_numbers(par)
    assert np.isfinite(a).sum() > 50 and np.isfinite(rate_a).sum() > 15
    assert np.array_equal(a, b, equal_nan=True)
    np.testing.assert_allclose(rate_b, rate_a, rtol=0, atol=1e-15)
    assert [m.name for m in ref.models] == [m.name for m in par.models] and ref.chosen_model == par.chosen_model
    assert ref.warnings == par.warnings
    assert ("bootstrap", 12, 12) in ticks and ("ranges", 4, 4) in ticks


def test_analyze_rejects_bad_jobs():
    plan, counts = _one_qubit_run()
    for bad in (0, -1, 1.5, True):
        with pytest.raises(ValueError, match="'jobs' must be a positive integer"):
            rt.analyze(plan, counts, bootstrap=2, jobs=bad)
