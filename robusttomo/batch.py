"""Whole-device characterization: many analyses from one manifest, resumable, local or on Dask.

A batch manifest (JSON, schema in ``docs/batch.md``) lists jobs, each one gate of a device: a
plan, its counts (or a device description to simulate with a seed), the expected target and a
label.  :func:`run_batch` analyses every job, writes one result file per job and a device-wide
summary (``summary.csv``, ``summary.json``, ``summary.html``, ``device.png``).

Work unit = one job.  Locally the units run on a ``concurrent.futures`` process pool; with
``cluster=ADDRESS`` on a running Dask distributed scheduler (the optional extra ``cluster``),
where a job can also be split so that groups of its bootstrap replicates (and its range
programs and models) are work units of their own (``replicate_groups``).
Workers receive loaded, validated inputs and return the result file's bytes, so a cluster
needs no shared file system; the client writes every file atomically.

Resume: beside ``results/<label>.h5`` a small ``results/<label>.json`` holds the job's key
(plan and counts or device fingerprints, analysis options).  A rerun skips a job whose result
and key exist and match, so finished work is neither recomputed nor rewritten.
"""

from __future__ import annotations

import csv
import enum
import html
import io
import json
import math
import os
import re
import tempfile
import time
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from robusttomo import _io
from robusttomo.errors import DataError

__all__ = ["BatchJob", "BatchManifest", "BatchResult", "JobOutcome", "JobStatus", "load_manifest",
           "run_batch"]

MANIFEST_SCHEMA = 1
MANIFEST_KIND = "robusttomo-batch"
SUMMARY_SCHEMA = 1
_LABEL_RE = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.\-]{0,63}$")
_JOB_KEYS = {"label", "plan", "counts", "device", "simulate_seed", "target", "qubits"}
_OPTION_KEYS = {"bootstrap", "seed", "models", "ranges", "diamond"}
_TOP_KEYS = {"schema_version", "kind", "options", "jobs", "description"}


class JobStatus(enum.Enum):
    """What happened to one job in this run."""

    #: Analysed in this run.
    DONE = "done"
    #: A matching result existed; nothing recomputed.
    SKIPPED = "skipped"
    #: Bad input or analysis failure; see the error text.
    FAILED = "failed"


@dataclass(frozen=True)
class BatchJob:
    """One job of a manifest (paths already resolved against the manifest's directory).

    Attributes
    ----------
    label : str
        Unique name, also the result file's stem (letters, digits, ``_ . -``).
    plan : Path
        Plan file.
    counts : Path or None
        Counts file (exclusive with ``device``).
    device : Path or None
        Device description to simulate the plan on (needs ``simulate_seed``).
    simulate_seed : int or None
        Seed of the shot sampling for ``device``.
    target : str or None
        Expected target: ``"identity"`` (reference plan) or the plan's interleaved gate label;
        None accepts whatever the plan holds.
    qubits : tuple of int
        Device qubits the gate acts on (for the device figure); from ``qubits`` or the integers
        after ``q`` in the label (``"q0-q1"`` -> ``(0, 1)``).
    """

    label: str
    plan: Path
    counts: Path | None
    device: Path | None
    simulate_seed: int | None
    target: str | None
    qubits: tuple[int, ...]


@dataclass(frozen=True)
class BatchManifest:
    """A validated manifest.

    Attributes
    ----------
    path : Path
        The manifest file.
    jobs : tuple of BatchJob
    bootstrap : int
        Bootstrap replicates of every analysis.
    seed : int
        Bootstrap seed of every analysis (the same seed for each job).
    models, ranges, diamond : bool
        Passed to :func:`robusttomo.assess.analyze`.
    """

    path: Path
    jobs: tuple[BatchJob, ...]
    bootstrap: int = 200
    seed: int = 0
    models: bool = True
    ranges: bool = True
    diamond: bool = True

    def options(self) -> dict[str, object]:
        """The analysis options, as stored in every job key."""
        return {"bootstrap": self.bootstrap, "seed": self.seed, "models": self.models,
                "ranges": self.ranges, "diamond": self.diamond}


@dataclass(frozen=True)
class JobOutcome:
    """One job's row of the summary.

    Attributes
    ----------
    label : str
    qubits : tuple of int
    status : JobStatus
    error : str
        One-line error for a failed job, else ``""``.
    result : Path or None
        Result file (None when failed).
    figures : Mapping[str, float]
        ``average_gate_fidelity``, ``..._low``, ``..._high`` and the same for
        ``diamond_distance``, ``unitarity``, ``coherent_share``, plus ``diamond_range_low/high``
        and ``average_error`` (``1 - fidelity``); empty when failed.  Errors are errors and
        fidelities fidelities (no sign change).
    target : str
        Target label of the analysis (``""`` when failed).
    warnings : tuple of str
        The analysis warnings.
    """

    label: str
    qubits: tuple[int, ...]
    status: JobStatus
    error: str = ""
    result: Path | None = None
    figures: Mapping[str, float] = field(default_factory=dict)
    target: str = ""
    warnings: tuple[str, ...] = ()


@dataclass(frozen=True)
class BatchResult:
    """What :func:`run_batch` wrote.

    Attributes
    ----------
    directory : Path
    outcomes : tuple of JobOutcome
        Sorted worst first: failed jobs, then by decreasing average error.
    csv, json, html, figure : Path
        The summary files.
    elapsed : float
        Wall time in seconds.
    """

    directory: Path
    outcomes: tuple[JobOutcome, ...]
    csv: Path
    json: Path
    html: Path
    figure: Path
    elapsed: float

    @property
    def n_failed(self) -> int:
        """Number of failed jobs."""
        return sum(o.status is JobStatus.FAILED for o in self.outcomes)


# ---- manifest -------------------------------------------------------------------------------
def _job_from_doc(doc: object, i: int, base: Path, p: Path) -> BatchJob:
    where = f"{p}: jobs[{i}]"
    if not isinstance(doc, dict):
        raise DataError(f"{where}: must be an object with 'label', 'plan' and 'counts' or 'device'; "
                        f"got {type(doc).__name__}")
    extra = sorted(set(doc) - _JOB_KEYS)
    if extra:
        raise DataError(f"{where}: unknown field {extra[0][:40]!r}; allowed fields are {sorted(_JOB_KEYS)}")
    label = doc.get("label")
    if not isinstance(label, str) or not _LABEL_RE.match(label):
        raise DataError(f"{where}: field 'label' must be 1-64 letters, digits, '_', '.' or '-' (starting with a "
                        f"letter or digit); got {str(label)[:40]!r}")
    where = f"{p}: job {label!r}"

    def path_field(key: str) -> Path | None:
        v = doc.get(key)
        if v is None:
            return None
        if not isinstance(v, str) or not v:
            raise DataError(f"{where}: field {key!r} must be a file path string; got {str(v)[:40]!r}")
        q = Path(v)
        return q if q.is_absolute() else base / q

    plan = path_field("plan")
    if plan is None:
        raise DataError(f"{where}: field 'plan' is missing; give the plan file of this gate")
    counts, device = path_field("counts"), path_field("device")
    if (counts is None) == (device is None):
        raise DataError(f"{where}: give exactly one of field 'counts' (measured) or field 'device' (simulate)")
    seed = doc.get("simulate_seed")
    if device is not None:
        if isinstance(seed, bool) or not isinstance(seed, int) or seed < 0:
            raise DataError(f"{where}: field 'simulate_seed' must be a non-negative integer when 'device' is "
                            f"given; got {str(seed)[:40]}")
    elif seed is not None:
        raise DataError(f"{where}: field 'simulate_seed' applies only with field 'device'")
    target = doc.get("target")
    if target is not None and (not isinstance(target, str) or not target):
        raise DataError(f"{where}: field 'target' must be 'identity' or the plan's gate label; got {str(target)[:40]!r}")
    qubits_doc = doc.get("qubits")
    if qubits_doc is None:
        qubits = tuple(int(t) for t in re.findall(r"q(\d+)", label))
    else:
        if (not isinstance(qubits_doc, list) or not qubits_doc
                or any(isinstance(q, bool) or not isinstance(q, int) or q < 0 for q in qubits_doc)):
            raise DataError(f"{where}: field 'qubits' must be a non-empty list of non-negative integers; "
                            f"got {str(qubits_doc)[:40]}")
        qubits = tuple(qubits_doc)
    return BatchJob(label=label, plan=plan, counts=counts, device=device,
                    simulate_seed=seed if device is not None else None, target=target, qubits=qubits)


def load_manifest(path: str | os.PathLike[str]) -> BatchManifest:
    """Read and validate a batch manifest (JSON, schema in ``docs/batch.md``).

    Parameters
    ----------
    path : str or path-like
        Manifest file; relative job paths are relative to its directory.

    Returns
    -------
    BatchManifest

    Raises
    ------
    DataError
        Unreadable or invalid JSON, wrong ``schema_version`` or ``kind``, unknown fields,
        duplicate labels; the message names the file, the job and the field.
    """
    p = Path(path)
    if not p.is_file():
        raise DataError(f"{p}: no such manifest file")
    try:
        doc = json.loads(p.read_bytes().decode("utf-8-sig"))
    except UnicodeDecodeError as err:
        raise DataError(f"{p}: not UTF-8 text (byte {err.start})") from None
    except (ValueError, RecursionError) as err:
        raise DataError(f"{p}: not valid JSON ({str(err)[:80]})") from None
    if not isinstance(doc, dict):
        raise DataError(f"{p}: top level must be a JSON object; got {type(doc).__name__}")
    sv = doc.get("schema_version")
    _io.check_schema(p, sv if not isinstance(sv, bool) else None, kind="batch manifest",
                     supported=(MANIFEST_SCHEMA,))
    if doc.get("kind", MANIFEST_KIND) != MANIFEST_KIND:
        raise DataError(f"{p}: field 'kind' must be {MANIFEST_KIND!r}; got {str(doc['kind'])[:40]!r}")
    extra = sorted(set(doc) - _TOP_KEYS)
    if extra:
        raise DataError(f"{p}: unknown field {extra[0][:40]!r}; allowed fields are {sorted(_TOP_KEYS)}")
    opts = doc.get("options", {})
    if not isinstance(opts, dict):
        raise DataError(f"{p}: field 'options' must be an object; got {type(opts).__name__}")
    extra = sorted(set(opts) - _OPTION_KEYS)
    if extra:
        raise DataError(f"{p}: unknown field 'options.{extra[0][:40]}'; allowed are {sorted(_OPTION_KEYS)}")
    kw: dict[str, Any] = {}
    for key in ("bootstrap", "seed"):
        if key in opts:
            v = opts[key]
            if isinstance(v, bool) or not isinstance(v, int) or v < 0:
                raise DataError(f"{p}: field 'options.{key}' must be a non-negative integer; got {str(v)[:40]}")
            kw[key] = v
    for key in ("models", "ranges", "diamond"):
        if key in opts:
            if not isinstance(opts[key], bool):
                raise DataError(f"{p}: field 'options.{key}' must be true or false; got {str(opts[key])[:40]}")
            kw[key] = opts[key]
    jobs_doc = doc.get("jobs")
    if not isinstance(jobs_doc, list) or not jobs_doc:
        raise DataError(f"{p}: field 'jobs' must be a non-empty list of job objects")
    base = p.resolve().parent
    jobs = tuple(_job_from_doc(j, i, base, p) for i, j in enumerate(jobs_doc))
    seen: set[str] = set()
    for j in jobs:
        if j.label.lower() in seen:  # result files are named by label; case-insensitive file systems
            raise DataError(f"{p}: field 'label' {j.label!r} appears twice; labels must be unique")
        seen.add(j.label.lower())
    return BatchManifest(path=p, jobs=jobs, **kw)


# ---- one work unit ----------------------------------------------------------------------------
def _one_line(err: BaseException) -> str:
    text = " ".join(str(err).split())
    return f"{type(err).__name__}: {text}" if text else type(err).__name__


def _prepare(job: BatchJob, options: Mapping[str, object]) -> tuple[dict[str, object], dict[str, object]]:
    """Load and validate a job's inputs (client side); return (work unit, key)."""
    from robusttomo.plan import load_plan

    plan = load_plan(job.plan)
    expected = "identity" if plan.interleave is None else plan.interleave.label
    if job.target is not None and job.target != expected:
        raise DataError(f"job {job.label!r}: field 'target' is {job.target!r} but the plan {job.plan} "
                        f"characterizes {expected!r}; fix the manifest or the plan")
    key: dict[str, object] = {"plan_fingerprint": plan.fingerprint, "options": dict(options), "target": expected}
    unit: dict[str, object] = {"label": job.label, "plan": plan, "options": dict(options)}
    if job.counts is not None:
        from robusttomo.counts import load_counts

        counts = load_counts(job.counts)
        if counts.plan_fingerprint != plan.fingerprint:
            raise DataError(f"{job.counts}: field 'plan_fingerprint' ({counts.plan_fingerprint[:12]}...) does not "
                            f"match the plan {job.plan} ({plan.fingerprint[:12]}...); use the counts taken with "
                            "this plan")
        key["counts_fingerprint"] = counts.fingerprint
        unit["counts"] = counts
    else:
        from robusttomo.simulate import load_device

        device = load_device(job.device)  # type: ignore[arg-type]
        if device.n_qubits != plan.n_qubits:
            raise DataError(f"{job.device}: field 'n_qubits' is {device.n_qubits} but the plan {job.plan} has "
                            f"{plan.n_qubits} qubit(s)")
        key["device_fingerprint"] = device.fingerprint
        key["simulate_seed"] = job.simulate_seed
        # Device holds read-only mappings that do not pickle; the worker re-reads the checked text
        unit["device_json"] = Path(job.device).read_text(encoding="utf-8-sig")  # type: ignore[arg-type]
        unit["simulate_seed"] = job.simulate_seed
    return unit, key


def _unit_inputs(unit: Mapping[str, object]) -> tuple[Any, Any]:
    """The unit's plan and counts (simulated here when the job gives a device)."""
    plan = unit["plan"]
    counts = unit.get("counts")
    if counts is None:
        from robusttomo.simulate import load_device, simulate

        with tempfile.TemporaryDirectory(prefix="robusttomo-batch-") as tmp:
            dev_path = Path(tmp) / "device.json"
            dev_path.write_text(str(unit["device_json"]), encoding="utf-8")
            device = load_device(dev_path)
        counts = simulate(plan, device, seed=unit["simulate_seed"])  # type: ignore[arg-type]
    return plan, counts


def _result_bytes(rec: Any) -> bytes:
    from robusttomo.assess import save_reconstruction

    with tempfile.TemporaryDirectory(prefix="robusttomo-batch-") as tmp:
        out = Path(tmp) / "result.h5"
        save_reconstruction(rec, out)
        return out.read_bytes()


def _run_unit(unit: Mapping[str, object]) -> dict[str, object]:
    """Worker side: simulate if asked, analyse, return the result file's bytes (or the error).

    Never raises for a job's own failure, so one bad job cannot cancel the others.
    """
    try:
        from robusttomo.assess import analyze

        plan, counts = _unit_inputs(unit)
        opts: Mapping[str, Any] = unit["options"]  # type: ignore[assignment]
        rec = analyze(plan, counts, bootstrap=opts["bootstrap"], seed=opts["seed"], models=opts["models"],
                      ranges=opts["ranges"], diamond=opts["diamond"], jobs=1)
        return {"label": unit["label"], "ok": True, "data": _result_bytes(rec),
                "counts_fingerprint": counts.fingerprint}
    except Exception as err:  # noqa: BLE001 - a job's failure is reported, not propagated
        return {"label": unit["label"], "ok": False, "error": _one_line(err)[:400]}


# A job split into work units (Dask path with replicate groups): one "prepare" unit (inputs,
# correlations, decays and their bootstrap, point fit), one unit per part of the analysis
# (robusttomo.assess._parts_for: the two range families, the point figures, the models, and
# each group of bootstrap replicates), and one "assemble" unit that merges them into the result
# file.  Each part starts its solvers from a fixed state, so the file is the one analyze()
# writes in one process.  None of these raises for the job's own failure either.
def _unit_prepare(unit: Mapping[str, object]) -> dict[str, object]:
    try:
        from robusttomo.assess import _prepare_analysis

        plan, counts = _unit_inputs(unit)
        opts: Mapping[str, Any] = unit["options"]  # type: ignore[assignment]
        prep = _prepare_analysis(plan, counts, target=None, reference=None, bootstrap=opts["bootstrap"],
                                 seed=opts["seed"], probes=None, control_variate=True, models=opts["models"],
                                 ranges=opts["ranges"], diamond=opts["diamond"], solver="SCS",
                                 tick=lambda *a: None)
        return {"ok": True, "prep": prep, "counts_fingerprint": counts.fingerprint}
    except Exception as err:  # noqa: BLE001
        return {"ok": False, "error": _one_line(err)[:400]}


def _unit_part(prepared: Mapping[str, object], part: tuple) -> dict[str, object]:
    if not prepared["ok"]:
        return {"ok": False, "error": ""}
    try:
        from robusttomo.assess import _run_part

        return {"ok": True, "result": _run_part(prepared["prep"], part)}  # type: ignore[arg-type]
    except Exception as err:  # noqa: BLE001
        return {"ok": False, "error": _one_line(err)[:400]}


def _unit_assemble(label: str, prepared: Mapping[str, object], *parts: Mapping[str, object]) -> dict[str, object]:
    if not prepared["ok"]:
        return {"label": label, "ok": False, "error": prepared["error"]}
    for p in parts:
        if not p["ok"]:
            return {"label": label, "ok": False, "error": p["error"]}
    try:
        from robusttomo.assess import _assemble_analysis

        rec = _assemble_analysis(prepared["prep"], [p["result"] for p in parts])  # type: ignore[arg-type,misc]
        return {"label": label, "ok": True, "data": _result_bytes(rec),
                "counts_fingerprint": prepared["counts_fingerprint"]}
    except Exception as err:  # noqa: BLE001
        return {"label": label, "ok": False, "error": _one_line(err)[:400]}


# ---- summary ----------------------------------------------------------------------------------
_FIELDS = ("average_gate_fidelity", "diamond_distance", "unitarity", "coherent_share")


def _figures_of(rec: Any) -> dict[str, float]:
    f = rec.figures
    out: dict[str, float] = {}
    for name in _FIELDS:
        iv = getattr(f, name)
        out[name], out[name + "_low"], out[name + "_high"] = float(iv.value), float(iv.low), float(iv.high)
    out["diamond_range_low"] = float(f.diamond_distance_range.low)
    out["diamond_range_high"] = float(f.diamond_distance_range.high)
    out["average_error"] = 1.0 - out["average_gate_fidelity"]
    return out


def _sort_key(o: JobOutcome) -> tuple[int, float, str]:
    if o.status is JobStatus.FAILED:
        return (0, 0.0, o.label)
    err = o.figures.get("average_error", math.nan)
    return (1, -err if math.isfinite(err) else math.inf, o.label)


_CSV_COLUMNS = ("rank", "label", "qubits", "target", "status", "average_error", "average_gate_fidelity",
                "average_gate_fidelity_low", "average_gate_fidelity_high", "diamond_distance",
                "diamond_distance_low", "diamond_distance_high", "diamond_range_low", "diamond_range_high",
                "unitarity", "unitarity_low", "unitarity_high", "coherent_share", "coherent_share_low",
                "coherent_share_high", "warnings", "error", "result")


def _num(x: float) -> float | None:
    return x if math.isfinite(x) else None


def _rows(outcomes: Sequence[JobOutcome], directory: Path) -> list[dict[str, object]]:
    rows = []
    for rank, o in enumerate(outcomes, 1):
        row: dict[str, object] = {"rank": rank, "label": o.label, "qubits": list(o.qubits), "target": o.target,
                                  "status": o.status.value, "warnings": list(o.warnings), "error": o.error,
                                  "result": "" if o.result is None else str(o.result.relative_to(directory))}
        for c in _CSV_COLUMNS:
            if c not in row:
                row[c] = _num(o.figures[c]) if c in o.figures else None
        rows.append(row)
    return rows


def _write_text(path: Path, text: str) -> None:
    with _io.atomic_path(path, force=True) as tmp:
        tmp.write_text(text, encoding="utf-8")


def _write_csv(path: Path, rows: list[dict[str, object]]) -> None:
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(_CSV_COLUMNS)
    for r in rows:
        cells = []
        for c in _CSV_COLUMNS:
            v = r[c]
            if c == "qubits":
                v = " ".join(map(str, v))  # type: ignore[call-overload]
            elif c == "warnings":
                v = " | ".join(v)  # type: ignore[arg-type]
            elif isinstance(v, float):
                v = repr(v)
            elif v is None:
                v = ""
            cells.append(v)
        w.writerow(cells)
    _write_text(path, buf.getvalue())


def _write_figure(path: Path, outcomes: Sequence[JobOutcome]) -> None:
    """Device layout of our own: qubits on a circle, one-qubit jobs colour their node, two-qubit
    jobs the edge between their qubits; colour = average error (log scale); grey = failed."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.colors as mcolors
    import matplotlib.pyplot as plt
    import numpy as np

    qubits = sorted({q for o in outcomes for q in o.qubits})
    errs = [o.figures["average_error"] for o in outcomes
            if o.status is not JobStatus.FAILED and math.isfinite(o.figures.get("average_error", math.nan))]
    pos_errs = [e for e in errs if e > 0]
    lo, hi = (min(pos_errs), max(pos_errs)) if pos_errs else (1e-4, 1e-1)
    if hi <= lo:
        lo, hi = lo / 2, hi * 2
    norm = mcolors.LogNorm(vmin=lo, vmax=hi)
    cmap = plt.get_cmap("viridis_r")
    fig, ax = plt.subplots(figsize=(6.4, 5.6))
    n = max(len(qubits), 1)
    pos = {q: (math.cos(2 * math.pi * k / n + math.pi / 2), math.sin(2 * math.pi * k / n + math.pi / 2))
           for k, q in enumerate(qubits)}

    def colour(o: JobOutcome) -> object:
        if o.status is JobStatus.FAILED:
            return "lightgrey"
        e = o.figures.get("average_error", math.nan)
        return cmap(norm(min(max(e, lo), hi))) if math.isfinite(e) else "lightgrey"

    node_colour: dict[int, object] = {q: "white" for q in qubits}
    for o in outcomes:
        if len(o.qubits) >= 2:
            for a, b in zip(o.qubits, o.qubits[1:]):
                (x0, y0), (x1, y1) = pos[a], pos[b]
                ax.plot([x0, x1], [y0, y1], color=colour(o), lw=6, solid_capstyle="round", zorder=1)
                ax.text((x0 + x1) / 2, (y0 + y1) / 2, o.label, fontsize=7, ha="center", va="center", zorder=3)
        elif len(o.qubits) == 1:
            node_colour[o.qubits[0]] = colour(o)
    for q in qubits:
        x, y = pos[q]
        ax.scatter([x], [y], s=700, c=[node_colour[q]], edgecolors="black", zorder=2)
        ax.text(x, y, f"q{q}", ha="center", va="center", fontsize=8, zorder=3)
    sm = plt.cm.ScalarMappable(norm=norm, cmap=cmap)
    sm.set_array(np.array([]))
    fig.colorbar(sm, ax=ax, label="average error 1 - F (grey: failed)")
    ax.set_aspect("equal")
    ax.axis("off")
    ax.set_title("device gates coloured by average error")
    with _io.atomic_path(path, force=True) as tmp:
        fig.savefig(tmp, format="png", dpi=100)
    plt.close(fig)


def _fmt(x: object, digits: int = 5) -> str:
    return "" if x is None else (f"{x:.{digits}g}" if isinstance(x, float) else html.escape(str(x)))


def _write_html(path: Path, rows: list[dict[str, object]], manifest: BatchManifest, figure: Path) -> None:
    head = ("rank", "label", "qubits", "target", "status", "average error", "fidelity [95%]",
            "diamond distance [95%]", "diamond range", "unitarity [95%]", "coherent share [95%]", "warnings / error")
    lines = ["<!DOCTYPE html><html><head><meta charset='utf-8'><title>robusttomo batch summary</title>",
             "<style>body{font-family:sans-serif}td,th{border:1px solid #ccc;padding:3px 6px}"
             "table{border-collapse:collapse}tr.failed{background:#fdd}</style></head><body>",
             f"<h1>Device summary: {html.escape(manifest.path.name)}</h1>",
             f"<p>{len(rows)} job(s); options {html.escape(json.dumps(manifest.options()))}; sorted worst first "
             "(failed jobs on top, then by decreasing average error).</p>",
             f"<img src='{html.escape(figure.name)}' alt='device figure'>", "<table><tr>"
             + "".join(f"<th>{h}</th>" for h in head) + "</tr>"]

    def ci(r: dict[str, object], name: str) -> str:
        v = r[name]
        if v is None:
            return ""
        return f"{_fmt(v)} [{_fmt(r[name + '_low'])}, {_fmt(r[name + '_high'])}]"

    for r in rows:
        note = r["error"] if r["status"] == "failed" else "; ".join(r["warnings"])  # type: ignore[arg-type]
        cells = [r["rank"], r["label"], " ".join(map(str, r["qubits"])), r["target"], r["status"],  # type: ignore[call-overload]
                 _fmt(r["average_error"]), ci(r, "average_gate_fidelity"), ci(r, "diamond_distance"),
                 "" if r["diamond_range_low"] is None else f"[{_fmt(r['diamond_range_low'])}, "
                                                           f"{_fmt(r['diamond_range_high'])}]",
                 ci(r, "unitarity"), ci(r, "coherent_share"), html.escape(str(note))]
        cls = " class='failed'" if r["status"] == "failed" else ""
        lines.append(f"<tr{cls}>" + "".join(f"<td>{c if isinstance(c, str) else _fmt(c)}</td>" for c in cells)
                     + "</tr>")
    lines.append("</table></body></html>")
    _write_text(path, "\n".join(lines) + "\n")


# ---- the batch --------------------------------------------------------------------------------
def _key_path(result: Path) -> Path:
    return result.with_suffix(".json")


def _matching(result: Path, key: Mapping[str, object]) -> bool:
    kp = _key_path(result)
    if not (result.is_file() and kp.is_file()):
        return False
    try:
        stored = json.loads(kp.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return False
    return isinstance(stored, dict) and stored.get("key") == json.loads(json.dumps(key))


def _local_map(units: list[dict[str, object]], jobs: int) -> Any:
    """Yield unit results as they finish, on a local process pool (in-process for one job)."""
    if jobs == 1 or len(units) <= 1:
        for u in units:
            yield _run_unit(u)
        return
    from concurrent.futures import ProcessPoolExecutor, as_completed

    with ProcessPoolExecutor(max_workers=min(jobs, len(units))) as pool:
        futures = [pool.submit(_run_unit, u) for u in units]
        for fut in as_completed(futures):
            yield fut.result()


def _auto_groups(n_slots: int, n_units: int) -> int:
    """Replicate groups per job when not given: spread the jobs over every worker slot."""
    if n_units == 0 or n_slots <= n_units:
        return 1
    return -(-n_slots // n_units)


def _dask_map(units: list[dict[str, object]], address: str, replicate_groups: int | None = None) -> Any:
    """Yield unit results as they finish, on a running Dask distributed scheduler.

    With one replicate group per job (``replicate_groups`` 1, or None on a cluster with no
    more worker threads than jobs) a job is one task; otherwise each job becomes a small task
    graph (``_unit_prepare`` -> parts -> ``_unit_assemble``) with its bootstrap replicates in
    that many groups.
    """
    try:
        from distributed import Client, as_completed
    except ImportError:
        raise ValueError("'cluster' needs Dask distributed; install the extra: pip install 'robusttomo[cluster]'") from None
    try:
        client = Client(address, timeout="20s", set_as_default=False)
    except (OSError, TimeoutError) as err:
        raise ValueError(f"'cluster': cannot reach a Dask scheduler at {address!r} ({_one_line(err)[:120]}); "
                         "start one with 'dask scheduler' and give its tcp://HOST:PORT") from None
    try:
        groups = replicate_groups
        if groups is None:
            slots = sum(int(w.get("nthreads", 1)) for w in client.scheduler_info()["workers"].values())
            groups = _auto_groups(slots, len(units))
        token = f"{os.getpid()}-{time.time_ns()}"
        futures = []
        for u in units:
            opts: Mapping[str, Any] = u["options"]  # type: ignore[assignment]
            if groups <= 1 or int(opts["bootstrap"]) < 2:
                futures.append(client.submit(_run_unit, u, key=f"robusttomo-{u['label']}-{token}", pure=False))
                continue
            from robusttomo.assess import _parts_for

            prep = client.submit(_unit_prepare, u, key=f"robusttomo-prepare-{u['label']}-{token}", pure=False)
            parts = _parts_for(bootstrap=int(opts["bootstrap"]), models=bool(opts["models"]),
                               ranges=bool(opts["ranges"]), diamond=bool(opts["diamond"]), groups=groups)
            part_futures = [client.submit(_unit_part, prep, part, pure=False,
                                          key=f"robusttomo-part-{u['label']}-{'-'.join(map(str, part))}-{token}")
                            for part in parts]
            futures.append(client.submit(_unit_assemble, u["label"], prep, *part_futures, pure=False,
                                         key=f"robusttomo-{u['label']}-{token}"))
        with client.as_current():
            for fut in as_completed(futures):
                yield fut.result()
    finally:
        client.close()


def run_batch(manifest: BatchManifest | str | os.PathLike[str], directory: str | os.PathLike[str], *,
              jobs: int = 1, cluster: str | None = None, force: bool = False,
              replicate_groups: int | None = None,
              progress: Callable[[str, int, int], None] | None = None) -> BatchResult:
    """Run every job of a manifest and write per-job results and the device summary.

    Layout of ``directory``: ``results/<label>.h5`` (a result file, see
    :func:`robusttomo.assess.save_reconstruction`) with ``results/<label>.json`` (the job key
    used for resume), ``summary.csv``, ``summary.json``, ``summary.html``, ``device.png``.
    Summary rows are sorted worst first: failed jobs, then by decreasing average error
    ``1 - F`` (average gate fidelity of the noisy gate against its target).

    Parameters
    ----------
    manifest : BatchManifest or path
        The manifest (read with :func:`load_manifest` when a path).
    directory : str or path-like
        Output directory (created if missing).
    jobs : int, default 1
        Local worker processes (ignored with ``cluster``).
    cluster : str, optional
        Address of a running Dask distributed scheduler, e.g. ``"tcp://10.0.0.5:8786"``.
    force : bool, default False
        Recompute every job and overwrite its result.  Without it a job whose result and key
        exist and match is skipped, and a result whose key does not match is replaced
        (its inputs or options changed).
    replicate_groups : int, optional
        Cluster only: split each job's bootstrap replicates into this many groups, each a work
        unit of its own (with the range programs, the point figures and the models as further
        units; results are the same to the last digit).  1 keeps whole jobs as the units.
        Default (None): whole jobs when the cluster has no more worker threads than jobs to
        run, else ``ceil(threads / jobs)`` groups per job.  Locally the jobs are always the
        units (a pool of ``jobs`` processes is kept busy by whole jobs).
    progress : callable, optional
        ``progress(stage, done, total)``.

    Returns
    -------
    BatchResult
        A failed job does not raise: it appears with status FAILED and its one-line error.
    """
    start = time.monotonic()
    if isinstance(jobs, bool) or not isinstance(jobs, int) or jobs < 1:
        raise ValueError(f"'jobs' must be a positive integer; got {jobs!r}")
    if cluster is not None and (not isinstance(cluster, str) or not cluster):
        raise ValueError(f"'cluster' must be a scheduler address such as 'tcp://HOST:8786'; got {cluster!r}")
    if replicate_groups is not None:
        if isinstance(replicate_groups, bool) or not isinstance(replicate_groups, int) or replicate_groups < 1:
            raise ValueError(f"'replicate_groups' must be a positive integer or None; got {replicate_groups!r}")
        if cluster is None:
            raise ValueError("'replicate_groups' applies to the cluster path only; give 'cluster' too, or drop "
                             "it (locally whole jobs are the work units)")
    if not isinstance(manifest, BatchManifest):
        manifest = load_manifest(manifest)
    out = Path(directory)
    res_dir = out / "results"
    res_dir.mkdir(parents=True, exist_ok=True)
    options = manifest.options()
    outcomes: dict[str, JobOutcome] = {}
    keys: dict[str, dict[str, object]] = {}
    units: list[dict[str, object]] = []
    by_label = {j.label: j for j in manifest.jobs}
    for job in manifest.jobs:
        result = res_dir / f"{job.label}.h5"
        try:
            unit, key = _prepare(job, options)
        except Exception as err:  # noqa: BLE001 - a bad input fails its job only
            outcomes[job.label] = JobOutcome(label=job.label, qubits=job.qubits, status=JobStatus.FAILED,
                                             error=_one_line(err)[:400])
            continue
        keys[job.label] = key
        if not force and _matching(result, key):
            outcomes[job.label] = JobOutcome(label=job.label, qubits=job.qubits, status=JobStatus.SKIPPED,
                                             result=result)
        else:
            units.append(unit)
    total = len(units)
    if progress is not None:
        progress("analyzing jobs", 0, total)
    stream = _dask_map(units, cluster, replicate_groups) if cluster is not None else _local_map(units, jobs)
    for done, r in enumerate(stream, 1):
        label = str(r["label"])
        job = by_label[label]
        if r["ok"]:
            result = res_dir / f"{label}.h5"
            key_file = _key_path(result)
            if key_file.exists():  # the key goes last, so a crash in between never leaves a stale match
                key_file.unlink()
            with _io.atomic_path(result, force=True) as tmp:
                tmp.write_bytes(r["data"])  # type: ignore[arg-type]
            key = dict(keys[label], counts_fingerprint=r["counts_fingerprint"])
            _write_text(key_file, json.dumps({"schema_version": SUMMARY_SCHEMA, "label": label,
                                              "key": keys[label], "counts_fingerprint": key["counts_fingerprint"]},
                                             indent=1) + "\n")
            outcomes[label] = JobOutcome(label=label, qubits=job.qubits, status=JobStatus.DONE, result=result)
        else:
            outcomes[label] = JobOutcome(label=label, qubits=job.qubits, status=JobStatus.FAILED,
                                         error=str(r["error"]))
        if progress is not None:
            progress("analyzing jobs", done, total)
    from robusttomo.assess import load_reconstruction

    final: list[JobOutcome] = []
    for job in manifest.jobs:
        o = outcomes[job.label]
        if o.result is not None:
            try:
                rec = load_reconstruction(o.result)
            except DataError as err:
                o = JobOutcome(label=o.label, qubits=o.qubits, status=JobStatus.FAILED, error=_one_line(err)[:400])
            else:
                o = JobOutcome(label=o.label, qubits=o.qubits, status=o.status, result=o.result,
                               figures=_figures_of(rec), target=rec.target_label, warnings=tuple(rec.warnings))
        final.append(o)
    final.sort(key=_sort_key)
    rows = _rows(final, out)
    paths = {k: out / name for k, name in (("csv", "summary.csv"), ("json", "summary.json"),
                                           ("html", "summary.html"), ("figure", "device.png"))}
    _write_csv(paths["csv"], rows)
    _write_text(paths["json"], json.dumps({"schema_version": SUMMARY_SCHEMA, "kind": "robusttomo-batch-summary",
                                           "manifest": str(manifest.path), "options": options, "rows": rows},
                                          indent=1, allow_nan=False) + "\n")
    _write_figure(paths["figure"], final)
    _write_html(paths["html"], rows, manifest, paths["figure"])
    return BatchResult(directory=out, outcomes=tuple(final), elapsed=time.monotonic() - start, **paths)
