"""Run every benchmark and regenerate the validation-study sections of docs/benchmarks.md.

From the repository root::

    python benchmarks/run_all.py            # small size: under 10 minutes on 2 cores
    python benchmarks/run_all.py --full     # the full study (hours)

What it does, in this order (the timings of one step are not disturbed by another):

1. the other benchmark scripts ``benchmarks/bench_*.py``, each in its own process, at a small
   configuration, ``--jobs`` at a time (their defaults, one at a time, with ``--full``); their
   own sections of docs/benchmarks.md are theirs and are not touched, only their exit status
   and wall time are recorded here;
2. the accuracy study (``study_accuracy.py``) and the coverage study (``study_coverage.py``),
   independent repeats spread over ``--jobs`` worker processes;
3. the speed study (``study_speed.py``), alone, in this process.

Then it writes ``docs/benchmarks-results.json`` (results of every size run so far, keyed by
size; the run replaces only its own size), the PNG plots ``docs/figures/study_*_<size>.png``,
and the text between ``<!-- study:begin -->`` and ``<!-- study:end -->`` in
``docs/benchmarks.md`` (appended if the markers are missing).  Everything else in that file is
left exactly as it was.  ``--size smoke`` is the smallest configuration, used by the test suite
(with ``--docs`` pointing at a temporary directory).

Long runs, in pieces.  ``--only`` also takes sub-studies (``accuracy.side``,
``accuracy.cross``, ``coverage.coverage``, ``coverage.weights``, ``coverage.remedy``,
``coverage.gate``); a
sub-study not named keeps
its stored result.  ``--raw DIR`` keeps a checkpoint file per sub-study in ``DIR`` (one JSON
line per finished repeat, see ``study_common.run_tasks``): an interrupted run resumes where it
stopped, and repeats computed by another process or another copy of the code merge.  The
full study is run that way from a read-only snapshot of the committed code (so that edits
other engineers make meanwhile cannot leak into a run)::

    git -C REPO archive HEAD | tar -x -C SNAP     # plus the benchmark scripts of the working tree
    cd SNAP && STUDY_CODE_VERSION=<commit> PYTHONPATH=SNAP \
        python benchmarks/run_all.py --full --only coverage.coverage --raw RAW --docs SCRATCH_DOCS

and the repository's docs are then regenerated from the saved repeats, without computing
anything (``--summarize``: only repeats already in ``RAW`` are used, and the tables say how
many of the planned ones that is)::

    python benchmarks/run_all.py --full --only coverage accuracy.side --raw RAW --summarize

Every repeat records the code it ran on (``code`` in the results: the snapshot's commit).
"""

from __future__ import annotations

import study_common as sc  # first: pins BLAS threads before numpy loads

import argparse  # noqa: E402
import datetime  # noqa: E402
import json  # noqa: E402
import os  # noqa: E402
import subprocess  # noqa: E402
import sys  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402

import study_accuracy  # noqa: E402
import study_coverage  # noqa: E402
import study_speed  # noqa: E402

BEGIN, END = "<!-- study:begin -->", "<!-- study:end -->"
SMALL_BUDGET_S = 600.0

#: Small-size arguments of the other benchmark scripts (their defaults run with ``--full``).
SCRIPT_ARGS_SMALL: dict[str, list[str]] = {
    "bench_batch.py": ["--gates", "2"],
    "bench_clifford.py": ["--size", "20000", "--repeats", "1"],
    "bench_estimate.py": ["--sequences", "500", "--bootstrap", "20"],
    "bench_metrics.py": ["--channels", "3"],
    "bench_planner.py": ["--repeats", "30", "--skip-two-qubits"],
    "bench_reconstruct.py": ["--replicates", "20", "--rebuild", "5"],
    "bench_simulate.py": ["--repeat", "1"],
}
#: Scripts left out of the small run (run with ``--full``), and why.
SCRIPT_SKIP_SMALL: dict[str, str] = {
    "bench_demo.py": "end-to-end timing of `robusttomo demo` (about 130 s alone on this machine, its own "
                     "target 90 s); it has no smaller configuration, so only --full runs it",
}
#: A script without a known small configuration gets its defaults and this much time.
SCRIPT_TIMEOUT_SMALL_S = 120.0

STUDIES = ("scripts", "accuracy", "coverage", "speed")
#: Sub-studies of the studies that have them (``--only accuracy.side``).
SUBSTUDIES: dict[str, tuple[str, ...]] = {"accuracy": ("side", "cross"), "coverage": ("coverage", "weights", "remedy", "gate")}
CHOICES = STUDIES + tuple(f"{k}.{v}" for k, vs in SUBSTUDIES.items() for v in vs)


def _parse_only(only: tuple[str, ...]) -> dict[str, tuple[str, ...]]:
    """``("accuracy.side", "coverage")`` -> ``{"accuracy": ("side",), "coverage": ("coverage", "gate")}``."""
    bad = [o for o in only if o not in CHOICES]
    if bad:
        raise ValueError(f"'studies' must be among {list(CHOICES)}; got {bad}")
    out: dict[str, list[str]] = {}
    for o in only:
        study, _, sub = o.partition(".")
        subs = SUBSTUDIES.get(study, ())
        have = out.setdefault(study, [])
        for x in ((sub,) if sub else subs):
            if x not in have:
                have.append(x)
    return {k: tuple(sorted(v, key=SUBSTUDIES.get(k, ()).index)) if k in SUBSTUDIES else () for k, v in out.items()}


def _command(size: str) -> str:
    return {"small": "python benchmarks/run_all.py", "full": "python benchmarks/run_all.py --full",
            "smoke": "python benchmarks/run_all.py --size smoke"}[size]


def _run_script(path: Path, size: str) -> dict:
    args = [] if size == "full" else SCRIPT_ARGS_SMALL.get(path.name, [])
    if size != "full" and path.name in SCRIPT_SKIP_SMALL:
        return {"script": path.name, "args": args, "exit_status": "skipped", "wall_s": 0.0,
                "last_line": "not run at this size: " + SCRIPT_SKIP_SMALL[path.name]}
    timeout = None if size == "full" or path.name in SCRIPT_ARGS_SMALL else SCRIPT_TIMEOUT_SMALL_S
    t0 = time.perf_counter()
    try:
        env = {**os.environ, "PYTHONPATH": os.pathsep.join(
            [str(sc.ROOT)] + ([os.environ["PYTHONPATH"]] if os.environ.get("PYTHONPATH") else []))}
        p = subprocess.run([sys.executable, str(path), *args], cwd=sc.ROOT, capture_output=True, text=True,
                           timeout=timeout, env=env)
        status, tail = p.returncode, (p.stdout.strip().splitlines() or [""])[-1]
        if p.returncode != 0 and p.stderr.strip():
            tail = p.stderr.strip().splitlines()[-1]
    except subprocess.TimeoutExpired:
        status, tail = None, f"stopped after {timeout:.0f} s (no small configuration known)"
    return {"script": path.name, "args": args, "exit_status": status, "wall_s": time.perf_counter() - t0,
            "last_line": tail[:200]}


def run_scripts(size: str, *, jobs: int = 1) -> list[dict]:
    """Every ``bench_*.py`` beside this file, one fresh process each; exit status and wall time.

    Small size: up to ``jobs`` scripts at a time (their timings then share the machine, so
    they are not the scripts' measurements); full size: one at a time, defaults.
    """
    from concurrent.futures import ThreadPoolExecutor

    slow_first = ("bench_planner.py", "bench_reconstruct.py", "bench_demo.py")
    paths = sorted(sc.HERE.glob("bench_*.py"), key=lambda p: (p.name not in slow_first, p.name))
    width = 1 if size == "full" else max(1, jobs)
    with ThreadPoolExecutor(max_workers=width) as ex:
        return list(ex.map(lambda p: _run_script(p, size), paths))


def _scripts_markdown(rows: list[dict]) -> str:
    if not rows:
        return ""
    lines = ["### Other benchmark scripts", "",
             "Run first, one process each (at the small size two at a time, so their times share the "
             "machine); their own sections above hold their numbers, measured by their authors. Here "
             "only the exit status of this run (0: the script ran and met its own target, if it has one) "
             "and its wall time.", ""]
    lines.append(sc.md_table(["script", "arguments", "exit status", "wall s", "last line of output"],
                             [[r["script"], " ".join(r["args"]) or "(defaults)",
                               "timeout" if r["exit_status"] is None else str(r["exit_status"]),
                               r["wall_s"] if r["exit_status"] != "skipped" else "-",
                               r["last_line"].replace("|", "/")] for r in rows]))
    lines.append("")
    return "\n".join(lines)


def _target_rows(name: str, result: dict) -> list[list[object]]:
    """Target rows ``[study, target, measured, verdict]`` of one part's results."""
    keys = {"accuracy": ("side", "cross"), "coverage": ("coverage",), "speed": (None,)}[name]
    blocks = [result if k is None else result[k] for k in keys]
    rows = []
    for block in blocks:
        for t in block["targets"]:
            where = f"{t['n']}q, " if "n" in t else ""
            where += f"readout {100 * t['readout']:g}%, " if "readout" in t else ""
            rows.append([name, where + t["target"], t["value"], sc.verdict(t["met"])])
    return rows


def _part_markdown(name: str, result: object, figures: dict[str, str]) -> str:
    if name == "scripts":
        text = _scripts_markdown(result)  # type: ignore[arg-type]
    else:
        mod = {"accuracy": study_accuracy, "coverage": study_coverage, "speed": study_speed}[name]
        text = mod.markdown(result, figures=figures)  # type: ignore[arg-type]
    # the study scripts write level-3 headings; here they sit one level below the size heading
    return "\n".join("#" + ln if ln.startswith("### ") else ln for ln in text.splitlines())


def size_markdown(entry: dict) -> str:
    """The markdown of one size from its stored entry (every part run so far)."""
    size = entry["size"]
    parts = entry["parts"]
    lines = [f"### Validation study, {size} size", ""]
    last = entry.get("complete_run")
    if last:
        m = last["machine"]
        lines += [f"Command (repository root): `{_command(size)}`. Last complete run {last['finished']}: "
                  f"total wall time {sc.fmt(last['wall_s'])} s with `--jobs {last['jobs']}` on Python "
                  f"{m['python']}, numpy {m['numpy']}, {m['cpus']} cores, load average at the start "
                  f"{m['load_average']} (the machine is shared: wall times vary by a factor of about 2 with the "
                  f"load). Raw numbers: `docs/benchmarks-results.json`, key `{size}`.", ""]
    else:
        lines += [f"Command (repository root): `{_command(size)}`. The parts below were run one at a time, "
                  f"`{_command(size)} --only <part>` (same code and configuration, one process each); "
                  "raw numbers: `docs/benchmarks-results.json`, key "
                  f"`{size}`.", ""]
    def how(k: str, v: dict) -> str:
        if v.get("summarized"):
            return (f"{k} regenerated {v['finished']} from saved repeats (`{v['command']}`; the repeats' own "
                    "times, load and code are in its tables)")
        cmd = f", `{v['command']}`" if v.get("command") else ""
        return (f"{k} finished {v['finished']} ({sc.fmt(v['wall_s'])} s, `--jobs {v['jobs']}`, load average at the "
                f"start {v['machine']['load_average'][0]}{cmd})")

    lines += ["Parts: " + "; ".join(how(k, v) for k, v in parts.items()) + ".", ""]
    if size == "small":
        lines += ["The small size is a quick check that everything runs and a rough preview: few repeats, "
                  "few bootstrap replicates. Verdicts below are those of this run; the full study is the "
                  "measurement of record.", ""]
    rows = [r for k in STUDIES if k in parts for r in parts[k]["targets"]]
    if last and size == "small":
        rows.append(["run_all", "small run under 10 minutes (wall, this machine, this load)", last["wall_s"],
                     sc.verdict(last["wall_s"] < SMALL_BUDGET_S)])
    lines += ["#### Targets", "", sc.md_table(["study", "target", "measured", "verdict"], rows), ""]
    for k in STUDIES:
        if k in parts and parts[k]["markdown"]:
            lines += [parts[k]["markdown"], ""]
    return "\n".join(lines).rstrip() + "\n"


def _merge_doc(doc_path: Path, block: str) -> str:
    text = doc_path.read_text(encoding="utf-8") if doc_path.exists() else "# Benchmarks\n"
    body = f"{BEGIN}\n{block.rstrip()}\n{END}"
    if BEGIN in text and END in text and text.index(BEGIN) < text.index(END):
        head, rest = text.split(BEGIN, 1)
        _, tail = rest.split(END, 1)
        return head + body + tail
    return text.rstrip() + "\n\n" + body + "\n"


INTRO = ["## Validation study (`benchmarks/run_all.py`)", "",
         "Generated by `benchmarks/run_all.py`; do not edit by hand between the study markers. "
         "`python benchmarks/run_all.py` runs the small size, `--full` the full study; each run "
         "regenerates its own size below and keeps the other. The scripts: "
         "`benchmarks/study_accuracy.py` (accuracy per shot against conventional tomography and "
         "standard benchmarking, crossover budget), `benchmarks/study_coverage.py` (interval coverage, "
         "gate-dependent noise), `benchmarks/study_speed.py` (speed, scaling, numpy floor); shared "
         "settings in `benchmarks/study_common.py`. Each script's docstring gives its method in full. "
         "Long full-size parts run in pieces from a read-only snapshot of the committed code, saving every "
         "finished repeat to a checkpoint directory (`--raw`); the tables here are then regenerated from "
         "the saved repeats with `--summarize` (see `run_all.py`'s docstring), and each table says which "
         "code its repeats ran on and how many of the planned repeats finished.", ""]


def _previous(entry: dict, name: str) -> dict | None:
    """The stored results of a study, each sub-study stamped with when it was measured."""
    part = entry["parts"].get(name)
    if not part:
        return None
    res = dict(part["results"])
    for k, v in res.items():
        if isinstance(v, dict):
            res[k] = {**v, "finished": v.get("finished") or part["finished"]}
    return res


def run(size: str, *, jobs: int, docs: Path, studies: tuple[str, ...] = STUDIES, raw: Path | None = None,
        summarize: bool = False, qubits: tuple[int, ...] | None = None, command: str = "") -> dict:
    """Run the studies, write JSON, figures and the markdown block; return this run's entry.

    The stored entry of ``size`` keeps the parts not run this time (``--only``), and a study
    run in part keeps its other sub-studies.  ``raw``: checkpoint directory (see the module
    docstring); ``summarize``: run no new coverage repeat, use those in ``raw``; ``qubits``:
    run new coverage repeats only for these qubit counts.
    """
    sc.check_size(size)
    only = _parse_only(tuple(studies))
    if summarize and raw is None:
        raise ValueError("'summarize' needs 'raw', the directory holding the saved repeats")
    docs = Path(docs)
    figdir = docs / "figures"
    figdir.mkdir(parents=True, exist_ok=True)
    json_path = docs / "benchmarks-results.json"
    store = json.loads(json_path.read_text(encoding="utf-8")) if json_path.exists() else {}
    entry = store.get(size) or {"size": size, "parts": {}}
    entry.setdefault("parts", {})
    machine = sc.machine()
    t0 = time.perf_counter()
    todo = [s for s in STUDIES if s in only and not (s == "scripts" and size == "smoke")]
    fns = {"scripts": lambda: run_scripts(size, jobs=jobs),
           "accuracy": lambda: study_accuracy.run(size, jobs=jobs, subparts=only["accuracy"],
                                                  previous=_previous(entry, "accuracy"), raw=raw,
                                                  run_missing=not summarize),
           "coverage": lambda: study_coverage.run(size, jobs=jobs, subparts=only["coverage"],
                                                  previous=_previous(entry, "coverage"), raw=raw,
                                                  run_missing=not summarize, qubits=qubits),
           "speed": lambda: study_speed.run(size)}
    for name in todo:
        s0 = time.perf_counter()
        result = fns[name]()
        wall = time.perf_counter() - s0
        figures = {} if name == "scripts" else {
            "accuracy": study_accuracy, "coverage": study_coverage, "speed": study_speed}[name].plot(
                result, figdir, rel="figures", suffix=f"_{size}")
        entry["parts"][name] = {"results": result, "wall_s": wall, "jobs": jobs, "machine": machine,
                                "finished": datetime.datetime.now().strftime("%Y-%m-%d %H:%M"),
                                "command": command, "summarized": bool(summarize and name in SUBSTUDIES),
                                "markdown": _part_markdown(name, result, figures),
                                "targets": _target_rows(name, result) if name != "scripts" else []}
        print(f"[run_all] {name} done in {wall:.1f} s", flush=True)
    wall_s = time.perf_counter() - t0
    whole = all(only.get(s) == SUBSTUDIES.get(s, ()) for s in todo)
    if whole and not summarize and len(todo) == len([s for s in STUDIES if not (s == "scripts" and size == "smoke")]):
        entry["complete_run"] = {"wall_s": wall_s, "jobs": jobs, "machine": machine,
                                 "finished": datetime.datetime.now().strftime("%Y-%m-%d %H:%M")}
    entry["markdown"] = size_markdown(entry)
    store[size] = entry
    sc.write_json(json_path, store)
    block = "\n".join(INTRO) + "\n" + "\n".join(store[s]["markdown"] for s in ("full", "small", "smoke") if s in store)
    doc_path = docs / "benchmarks.md"
    sc.write_text(doc_path, _merge_doc(doc_path, block))
    return {"entry": entry, "wall_s": wall_s}


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--full", action="store_true", help="the full study (same as --size full)")
    ap.add_argument("--size", choices=sc.SIZES, default=None, help="smoke, small (default) or full")
    ap.add_argument("--jobs", type=int, default=2, help="worker processes for independent repeats (default 2)")
    ap.add_argument("--docs", type=Path, default=sc.ROOT / "docs", help="docs directory to regenerate")
    ap.add_argument("--only", nargs="+", choices=CHOICES, default=list(STUDIES),
                    help="run only these parts or sub-studies (e.g. accuracy.side)")
    ap.add_argument("--raw", type=Path, default=None,
                    help="checkpoint directory: resume interrupted runs, merge repeats computed elsewhere")
    ap.add_argument("--summarize", action="store_true",
                    help="compute no new repeat: regenerate from the repeats saved in --raw")
    ap.add_argument("--qubits", type=int, nargs="+", default=None,
                    help="run new coverage repeats only for these qubit counts (the others: only from --raw)")
    args = ap.parse_args(argv)
    if args.summarize and args.raw is None:
        ap.error("--summarize needs --raw, the directory of saved repeats")
    if args.raw is not None:
        args.raw.mkdir(parents=True, exist_ok=True)
    if args.full and args.size not in (None, "full"):
        ap.error(f"--full contradicts --size {args.size}")
    size = "full" if args.full else (args.size or "small")
    if args.jobs < 1:
        ap.error(f"--jobs must be a positive integer; got {args.jobs}")
    if not args.docs.is_dir():
        ap.error(f"--docs must be an existing directory; got {args.docs}")
    command = "python benchmarks/run_all.py " + " ".join(argv if argv is not None else sys.argv[1:])
    res = run(size, jobs=args.jobs, docs=args.docs, studies=tuple(args.only), raw=args.raw,
              summarize=args.summarize, qubits=None if args.qubits is None else tuple(args.qubits),
              command=command.strip())
    print(f"[run_all] {size} run finished in {res['wall_s']:.1f} s; wrote {args.docs / 'benchmarks.md'}",
          flush=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
