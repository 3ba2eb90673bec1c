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
if str(ROOT) not in sys.path[:2]:  # measure this checkout's package, not another installed copy
    sys.path.insert(1, str(ROOT))

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
    return allocate(total, [5.0 if m <= 3 else 1.0 for m in lengths])


def allocate(total: int, weights: Sequence[float], *, floor: int = 2) -> list[int]:
    """``total`` split in proportion to ``weights`` (largest remainders), at least ``floor`` each.

    Entries whose share falls below ``floor`` are set to ``floor`` and the rest of ``total``
    is split among the others in proportion to their weights (repeated until none falls
    below).  The sum is ``total`` unless ``floor`` times the number of entries exceeds it.
    """
    w = np.asarray(weights, dtype=float)
    if w.ndim != 1 or w.size == 0 or not np.all(w >= 0) or w.sum() <= 0:
        raise ValueError(f"'weights' must be non-negative with a positive sum; got {list(weights)}")
    fixed = np.zeros(w.size, dtype=bool)
    while True:
        free = ~fixed
        left = total - floor * int(fixed.sum())
        raw = np.zeros(w.size)
        if free.any() and w[free].sum() > 0:
            raw[free] = max(left, 0) * w[free] / w[free].sum()
        low = free & (raw < floor)
        if not low.any():
            break
        fixed |= low
    out = np.where(fixed, floor, np.floor(raw)).astype(int)
    short = total - int(out.sum())
    rem = np.where(fixed, -1.0, raw - np.floor(raw))
    for i in np.argsort(-rem)[: max(short, 0)]:
        if not fixed[i]:
            out[i] += 1
    return [max(int(v), floor) for v in out]


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
def _jsonable(x: object, *, keep_nan: bool = False) -> object:
    if isinstance(x, dict):
        return {str(k): _jsonable(v, keep_nan=keep_nan) for k, v in x.items()}
    if isinstance(x, (list, tuple)):
        return [_jsonable(v, keep_nan=keep_nan) for v in x]
    if isinstance(x, np.ndarray):
        return _jsonable(x.tolist(), keep_nan=keep_nan)
    if isinstance(x, (np.bool_, bool)):
        return bool(x)
    if isinstance(x, (np.integer,)):
        return int(x)
    if isinstance(x, (float, np.floating)):
        v = float(x)
        return v if (keep_nan or math.isfinite(v)) else None  # JSON has no nan/inf
    return x


#: Keys whose ``None`` means "not applicable" rather than a number that was not finite.
_NONE_KEYS = frozenset({"covered", "met"})


def revive(x: object, _key: str | None = None) -> object:
    """Undo :func:`write_json`'s ``nan -> null`` on results read back from the JSON store.

    Every ``null`` becomes ``nan`` except under the keys of :data:`_NONE_KEYS`, where ``None``
    is a value of its own ("not computed").  Used when a stored sub-study is re-rendered.
    """
    if isinstance(x, dict):
        return {k: revive(v, k) for k, v in x.items()}
    if isinstance(x, list):
        return [revive(v, _key) for v in x]
    if x is None and _key not in _NONE_KEYS:
        return float("nan")
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
def code_version() -> str:
    """Which package code produced a result.

    ``STUDY_CODE_VERSION`` if set (long runs go from a snapshot outside the repository, and
    its launcher names the commit there); otherwise the repository's ``git`` commit, with
    ``+local`` when ``robusttomo/`` has uncommitted changes.  Read-only ``git`` queries only.
    """
    import subprocess

    env = os.environ.get("STUDY_CODE_VERSION")
    if env:
        return env
    try:
        head = subprocess.run(["git", "-C", str(ROOT), "rev-parse", "--short", "HEAD"], capture_output=True,
                              text=True, timeout=20).stdout.strip()
        dirty = subprocess.run(["git", "-C", str(ROOT), "status", "--porcelain", "--", "robusttomo"],
                               capture_output=True, text=True, timeout=20).stdout.strip()
    except (OSError, subprocess.SubprocessError):
        return "unknown"
    return (head or "unknown") + ("+local" if dirty else "")


def task_key(task: dict) -> str:
    """Canonical text of a task dict: the identity of one repeat in a checkpoint file."""
    return json.dumps(_jsonable(task, keep_nan=True), sort_keys=True)


def load_checkpoint(path: Path) -> dict[str, dict]:
    """Records of a checkpoint file by task key (later records of a key win).

    One JSON object per line, ``{"key", "task", "result", "finished"}``.  A last line cut
    short by an interrupted run is skipped (its task simply runs again).
    """
    path = Path(path)
    out: dict[str, dict] = {}
    if not path.exists():
        return out
    lines = path.read_text(encoding="utf-8").splitlines()
    for k, line in enumerate(lines):
        if not line.strip():
            continue
        try:
            rec = json.loads(line)
        except json.JSONDecodeError:
            if k == len(lines) - 1:
                continue
            raise ValueError(f"checkpoint {path}: line {k + 1} is not JSON; remove the line or the file") from None
        out[rec["key"]] = rec
    return out


def _append_record(path: Path, key: str, task: dict, result: dict) -> None:
    # Append-only, one line per finished repeat in a single write() on an O_APPEND descriptor:
    # an interrupted run loses at most the line being written, and two processes resuming the
    # same study (e.g. one per qubit count) append whole lines without interleaving them.
    line = json.dumps(_jsonable({"key": key, "task": task, "result": result,
                                 "finished": time.strftime("%Y-%m-%d %H:%M:%S")}, keep_nan=True))
    data = (line + "\n").encode("utf-8")
    fd = os.open(path, os.O_WRONLY | os.O_APPEND | os.O_CREAT, 0o644)
    try:
        if os.write(fd, data) != len(data):
            raise OSError(f"checkpoint {path}: short write")
        os.fsync(fd)
    finally:
        os.close(fd)


def run_tasks(fn: Callable[[dict], dict], tasks: Sequence[dict], *, jobs: int = 1,
              checkpoint: Path | None = None, run_missing: bool = True) -> list[dict]:
    """``[fn(t) for t in tasks]``, optionally over ``jobs`` worker processes (same order).

    Each task is independent and seeds its own generators, so the results do not depend on
    ``jobs``.  Workers are started with "spawn" (a fresh interpreter each): forking a process
    that already runs threads (solvers, an earlier pool) left workers deadlocked on an
    inherited lock.  They inherit the environment, so the one-thread BLAS setting holds.

    With ``checkpoint`` (a JSON-lines file, see :func:`load_checkpoint`) every finished task is
    appended to the file as soon as it finishes, and tasks already recorded there are not run
    again: an interrupted study resumes, and parts run elsewhere (another process, another
    copy of the code) merge.  With ``run_missing=False`` nothing runs: the result holds only
    the recorded tasks, so the list can be shorter than ``tasks`` (a partial study).
    """
    if isinstance(jobs, bool) or not isinstance(jobs, int) or jobs < 1:
        raise ValueError(f"'jobs' must be a positive integer; got {jobs!r}")
    keys = [task_key(t) for t in tasks]
    done = {} if checkpoint is None else load_checkpoint(Path(checkpoint))
    todo = [i for i, k in enumerate(keys) if k not in done] if run_missing else []
    results: dict[int, dict] = {}

    def record(i: int, res: dict) -> None:
        results[i] = res
        if checkpoint is not None:
            _append_record(Path(checkpoint), keys[i], tasks[i], res)

    if jobs == 1 or len(todo) <= 1:
        for i in todo:
            record(i, fn(tasks[i]))
    else:
        import multiprocessing
        from concurrent.futures import ProcessPoolExecutor, as_completed

        with ProcessPoolExecutor(max_workers=jobs, mp_context=multiprocessing.get_context("spawn")) as ex:
            futures = {ex.submit(fn, tasks[i]): i for i in todo}
            for fut in as_completed(futures):
                record(futures[fut], fut.result())
    out = []
    for i, k in enumerate(keys):
        if i in results:
            out.append(results[i])
        elif k in done:
            out.append(done[k]["result"])
    return out
