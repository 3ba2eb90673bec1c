"""The shipped demo: analysis and report of an invented two-qubit CZ experiment.

The data in ``robusttomo/demo_data/`` are produced by ``scripts/make_demo_data.py`` with a
fixed seed.  The scenario is invented (no real device): a CZ gate on a fictional test device
with a coherent ZZ over-rotation, amplitude damping on one qubit, 2-3% readout error and a
small preparation error; ``scenario.json`` describes it and holds the true figures of the
invented gate error, so the demo can show estimate and truth side by side.
"""

from __future__ import annotations

import json
import math
import time
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from importlib import resources
from pathlib import Path
from typing import Any

from robusttomo.errors import DataError

__all__ = ["DEMO_FILES", "DemoRun", "demo_data_path", "load_scenario", "run_demo"]

#: Files of the shipped demo data set.
DEMO_FILES = ("plan.h5", "counts.h5", "device.json", "scenario.json")
#: What ``run_demo`` writes into its directory besides the report files.
_RESULT_NAME = "result.h5"
#: Where the shipped data live (package data; replaced in tests by a small data set).
_DATA_DIR = Path(str(resources.files("robusttomo") / "demo_data"))


@dataclass(frozen=True)
class DemoRun:
    """What :func:`run_demo` produced.

    Attributes
    ----------
    directory : Path
    result : Path
        The analysis result (HDF5, readable with :func:`robusttomo.load_reconstruction`).
    report : robusttomo.report.ReportFiles
    reconstruction : robusttomo.assess.Reconstruction
    scenario : str
        One-line description of the invented scenario.
    truth : Mapping[str, float]
        True figures of the invented gate error (same names as the estimate's figures).
    elapsed : float
        Wall-clock seconds of analysis plus report.
    """

    directory: Path
    result: Path
    report: Any
    reconstruction: Any
    scenario: str
    truth: Mapping[str, float]
    elapsed: float


def demo_data_path(name: str) -> Path:
    """Path of one shipped demo file (one of :data:`DEMO_FILES`)."""
    if name not in DEMO_FILES:
        raise ValueError(f"'name' must be one of {list(DEMO_FILES)}; got {name!r}")
    p = Path(_DATA_DIR) / name
    if not p.is_file():
        raise DataError(f"{p}: shipped demo file is missing; reinstall robusttomo or run "
                        "scripts/make_demo_data.py")
    return p


def load_scenario() -> dict[str, Any]:
    """The demo's ``scenario.json`` (description, settings and true figures)."""
    p = demo_data_path("scenario.json")
    try:
        doc = json.loads(p.read_text(encoding="utf-8"))
    except (OSError, ValueError) as err:
        raise DataError(f"{p}: cannot read the demo scenario ({err})") from None
    if not isinstance(doc, dict) or doc.get("kind") != "robusttomo-demo-scenario":
        raise DataError(f"{p}: field 'kind' must be 'robusttomo-demo-scenario'")
    for key in ("description", "bootstrap", "analysis_seed", "true_figures"):
        if key not in doc:
            raise DataError(f"{p}: field {key!r} is missing")
    return doc


def run_demo(directory: str | Path, *, force: bool = False, bootstrap: int | None = None, jobs: int = 1,
             progress: Callable[[str, int, int], None] | None = None) -> DemoRun:
    """Analyze the shipped demo data and write the result and the report into ``directory``.

    Parameters
    ----------
    directory : str or Path
        Output directory (created if missing).  Receives ``result.h5``, ``report.html``,
        ``summary.json`` and the PNG figures.
    force : bool, default False
        Overwrite those files; without it ``FileExistsError`` is raised before any work if
        one of them exists.
    bootstrap : int, optional
        Bootstrap replicates; default the scenario's own (chosen so the demo runs in about a
        minute on two cores).
    jobs : int, default 1
        Worker processes for the decay bootstrap.
    progress : callable, optional
        ``progress(stage, done, total)``, passed to :func:`robusttomo.assess.analyze`.

    Returns
    -------
    DemoRun
    """
    from robusttomo.assess import analyze, save_reconstruction
    from robusttomo.counts import load_counts
    from robusttomo.plan import load_plan
    from robusttomo.report import FIGURE_NAMES, write_report

    out = Path(directory)
    if out.exists() and not out.is_dir():
        raise FileExistsError(f"{out}: exists and is not a directory; choose another output directory")
    targets = [out / _RESULT_NAME, out / "report.html", out / "summary.json"] + [out / f for f in FIGURE_NAMES]
    if not force:
        for t in targets:
            if t.exists():
                raise FileExistsError(f"{t}: output exists; choose another directory or pass --force to overwrite")
    scenario = load_scenario()
    b = int(scenario["bootstrap"]) if bootstrap is None else bootstrap
    if isinstance(b, bool) or b < 1:
        raise ValueError(f"'bootstrap' must be a positive integer; got {bootstrap!r}")
    plan = load_plan(demo_data_path("plan.h5"))
    counts = load_counts(demo_data_path("counts.h5"))
    start = time.monotonic()
    rec = analyze(plan, counts, bootstrap=b, seed=int(scenario["analysis_seed"]), jobs=jobs, progress=progress)
    out.mkdir(parents=True, exist_ok=True)
    result = out / _RESULT_NAME
    if progress is not None:
        progress("writing the report", 0, 1)
    save_reconstruction(rec, result, force=force)
    files = write_report(rec, out, force=force, plan=plan)
    if progress is not None:
        progress("writing the report", 1, 1)
    truth = {str(k): float(v) for k, v in scenario["true_figures"].items() if isinstance(v, (int, float))
             and math.isfinite(v)}
    return DemoRun(directory=out, result=result, report=files, reconstruction=rec,
                   scenario=str(scenario["description"]), truth=truth, elapsed=time.monotonic() - start)
