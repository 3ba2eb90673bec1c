"""Shared pieces of the validation study (``benchmarks/study_*.py``, driven by ``run_all.py``).

Not part of the package: devices and settings of the study, timing and memory helpers,
summary statistics, and the atomic writers used to regenerate the results.

Import this module before numpy anywhere in a study process: it pins the BLAS thread count
to one.  On the shared two-core machine, threaded BLAS made small eigendecompositions about
70 times slower (measured; see docs/baselines.md, "Speed").
"""

from __future__ import annotations

import os

for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ[_var] = "1"

import json  # noqa: E402
import math  # noqa: E402
import platform  # noqa: E402
import resource  # noqa: E402
import sys  # noqa: E402
import time  # noqa: E402
import tracemalloc  # noqa: E402
from collections.abc import Callable, Sequence  # noqa: E402
from dataclasses import dataclass  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
if str(HERE) not in sys.path:  # baselines.py lives beside the study scripts
    sys.path.insert(0, str(HERE))

SIZES = ("smoke", "small", "full")


def check_size(size: object) -> str:
    """Validate a study size name."""
    if size not in SIZES:
        raise ValueError(f"'size' must be one of {list(SIZES)}; got {size!r}")
    return str(size)


# ---- the simulated devices -------------------------------------------------------------------
def general_error(n_qubits: int):
    """The study's generic gate error: ``random_channel(n, 0.1)`` from a fixed seed.

    A random Stinespring channel near the identity (coherent, stochastic and non-unital parts
    together); the same channel for every repeat and every readout level, so every method and
    every setting sees the same device.
    """
    from robusttomo.channels import random_channel

    return random_channel(n_qubits, 0.1, np.random.default_rng(7000 + n_qubits))


def generator_error(n_qubits: int):
    """A coherent+stochastic gate error (Hamiltonian and Pauli-stochastic generator terms only).

    Used where a reduced model is compared with the full one: this error lies inside the
    "coherent+stochastic" model, so that model has no model bias on it.  Rates (fixed):
    one qubit ``h_Z = 0.03, h_X = 0.01, s_X = s_Y = 0.001, s_Z = 0.002``; two qubits
    ``h_ZZ = 0.03, h_IX = 0.015, h_ZI = 0.01`` and ``s = 0.001`` on each single-qubit Pauli
    plus ``s_ZZ = 0.002``.
    """
    from robusttomo.generators import channel_from_rates

    if n_qubits == 1:
        return channel_from_rates(1, hamiltonian={"Z": 0.03, "X": 0.01},
                                  stochastic={"X": 0.001, "Y": 0.001, "Z": 0.002})
    sto = {p: 0.001 for p in ("XI", "YI", "ZI", "IX", "IY", "IZ")}
    sto["ZZ"] = 0.002
    return channel_from_rates(2, hamiltonian={"ZZ": 0.03, "IX": 0.015, "ZI": 0.01}, stochastic=sto)


def device(n_qubits: int, error, readout_error: float):
    """Device with ``error`` after every Clifford, symmetric readout flips, perfect preparation."""
    import robusttomo as rt

    e = float(readout_error)
    return rt.Device.build(n_qubits, error=error, readout=[(e, e)] * n_qubits)


def split_sequences(total: int, lengths: Sequence[int]) -> list[int]:
    """Sequences per length summing to ``total``, five times as many at lengths <= 3.

    The proportions of the package's default plans (``robusttomo.plan``: 200/50 for one
    qubit, 500/100 for two), scaled to a total.
    """
    w = np.array([5.0 if m <= 3 else 1.0 for m in lengths])
    raw = total * w / w.sum()
    out = np.floor(raw).astype(int)
    for i in np.argsort(-(raw - out))[: total - int(out.sum())]:
        out[i] += 1
    return [max(int(v), 2) for v in out]


# ---- measurement helpers ---------------------------------------------------------------------
@dataclass(frozen=True)
class Timed:
    """Wall and CPU seconds of one call, and its result."""

    wall: float
    cpu: float
    value: object


def timed(fn: Callable[[], object]) -> Timed:
    """Run ``fn()`` once; wall time (``perf_counter``) and CPU time of this process."""
    w0, c0 = time.perf_counter(), time.process_time()
    out = fn()
    return Timed(time.perf_counter() - w0, time.process_time() - c0, out)


def traced_peak(fn: Callable[[], object]) -> tuple[float, object]:
    """Peak memory in MB allocated by ``fn()`` above its starting level (``tracemalloc``).

    numpy reports its array buffers to tracemalloc, so this counts the arrays a stage creates.
    Tracing slows Python-level allocation; time the stage in a separate, untraced call.
    """
    tracemalloc.start()
    try:
        tracemalloc.reset_peak()
        base = tracemalloc.get_traced_memory()[0]
        out = fn()
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    return (peak - base) / 2**20, out


def max_rss_mb() -> float:
    """Peak resident set size of this process so far, in MB (``resource.getrusage``, Linux KB)."""
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def machine() -> dict[str, object]:
    """What the numbers were measured on, including the load at the time."""
    load = os.getloadavg() if hasattr(os, "getloadavg") else (float("nan"),) * 3
    return {
        "python": platform.python_version(),
        "numpy": np.__version__,
        "platform": platform.platform(),
        "cpus": os.cpu_count(),
        "load_average": [round(x, 2) for x in load],
        "omp_num_threads": os.environ.get("OMP_NUM_THREADS"),
    }


def rms(x: Sequence[float]) -> float:
    """Root mean square of the finite entries (``nan`` if none)."""
    a = np.asarray(x, dtype=float)
    a = a[np.isfinite(a)]
    return float(np.sqrt(np.mean(a * a))) if a.size else float("nan")


def mean(x: Sequence[float]) -> float:
    """Mean of the finite entries (``nan`` if none)."""
    a = np.asarray(x, dtype=float)
    a = a[np.isfinite(a)]
    return float(np.mean(a)) if a.size else float("nan")


def clopper_pearson(hits: int, trials: int, level: float = 0.95) -> tuple[float, float]:
    """Exact binomial interval of a proportion (Clopper-Pearson; common practice).

    "The use of confidence or fiducial limits illustrated in the case of the binomial",
    Biometrika 26, 404 (1934).
    """
    import scipy.stats

    if trials == 0:
        return float("nan"), float("nan")
    a = (1 - level) / 2
    lo = 0.0 if hits == 0 else float(scipy.stats.beta.ppf(a, hits, trials - hits + 1))
    hi = 1.0 if hits == trials else float(scipy.stats.beta.ppf(1 - a, hits + 1, trials - hits))
    return lo, hi


def fmt(x: object, digits: int = 3) -> str:
    """Compact number for tables: ``nan`` as a dash, scientific notation when small or large."""
    if x is None:
        return "-"
    if isinstance(x, bool):
        return "yes" if x else "no"
    if isinstance(x, (int, np.integer)):
        return str(int(x))
    v = float(x)  # type: ignore[arg-type]
    if not math.isfinite(v):
        return "-" if math.isnan(v) else ("inf" if v > 0 else "-inf")
    if v == 0:
        return "0"
    if abs(v) >= 1e4 or abs(v) < 1e-2:
        return f"{v:.{digits - 1}e}"
    return f"{v:.{digits}g}"


def md_table(header: Sequence[str], rows: Sequence[Sequence[object]]) -> str:
    """A GitHub markdown table; cells go through :func:`fmt` unless already strings."""
    def cell(v: object) -> str:
        return v if isinstance(v, str) else fmt(v)

    lines = ["| " + " | ".join(header) + " |", "|" + "|".join("---" for _ in header) + "|"]
    lines += ["| " + " | ".join(cell(v) for v in r) + " |" for r in rows]
    return "\n".join(lines)


def verdict(ok: object) -> str:
    """``PASS`` / ``MISS`` / ``n/a`` for a target check."""
    if ok is None:
        return "n/a"
    return "PASS" if ok else "MISS"


# ---- output ----------------------------------------------------------------------------------
def _jsonable(x: object) -> object:
    if isinstance(x, dict):
        return {str(k): _jsonable(v) for k, v in x.items()}
    if isinstance(x, (list, tuple)):
        return [_jsonable(v) for v in x]
    if isinstance(x, np.ndarray):
        return _jsonable(x.tolist())
    if isinstance(x, (np.bool_, bool)):
        return bool(x)
    if isinstance(x, (np.integer,)):
        return int(x)
    if isinstance(x, (float, np.floating)):
        v = float(x)
        return v if math.isfinite(v) else None  # JSON has no nan/inf
    return x


def write_text(path: Path, text: str) -> None:
    """Atomic replace of a generated file (regenerated output, so overwriting is the intent)."""
    from robusttomo._io import atomic_path

    with atomic_path(path, force=True) as tmp:
        tmp.write_text(text, encoding="utf-8")


def write_json(path: Path, obj: object) -> None:
    """Atomic JSON write; NaN and infinities become ``null``."""
    write_text(path, json.dumps(_jsonable(obj), indent=1, sort_keys=True) + "\n")


def save_figure(fig, path: Path) -> None:
    """Atomic PNG write of a matplotlib figure."""
    from robusttomo._io import atomic_path

    with atomic_path(path, force=True) as tmp:
        fig.savefig(tmp, format="png", dpi=110, bbox_inches="tight")


def pyplot():
    """matplotlib's pyplot on the non-interactive Agg backend."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


# ---- running independent repeats -------------------------------------------------------------
def run_tasks(fn: Callable[[dict], dict], tasks: Sequence[dict], *, jobs: int = 1) -> list[dict]:
    """``[fn(t) for t in tasks]``, optionally over ``jobs`` worker processes (same order).

    Each task is independent and seeds its own generators, so the results do not depend on
    ``jobs``.  Workers are started with "spawn" (a fresh interpreter each): forking a process
    that already runs threads (solvers, an earlier pool) left workers deadlocked on an
    inherited lock.  They inherit the environment, so the one-thread BLAS setting holds.
    """
    if isinstance(jobs, bool) or not isinstance(jobs, int) or jobs < 1:
        raise ValueError(f"'jobs' must be a positive integer; got {jobs!r}")
    if jobs == 1 or len(tasks) <= 1:
        return [fn(t) for t in tasks]
    import multiprocessing
    from concurrent.futures import ProcessPoolExecutor

    with ProcessPoolExecutor(max_workers=jobs, mp_context=multiprocessing.get_context("spawn")) as ex:
        return list(ex.map(fn, tasks))
