"""Command line ``robusttomo``: one subcommand per step of the loop.

``plan`` -> (run on hardware, or ``simulate``) -> ``ingest`` -> ``analyze`` -> ``report`` /
``export``; ``demo`` runs analysis and report on the shipped, invented example data.

Exit status: 0 success, 2 bad input or usage (one line on stderr naming the file and field),
1 internal error (one line; ``--debug`` shows the traceback), 3 a failed requirement
(``analyze --require-fidelity``).  No output file is ever overwritten without ``--force``.
"""

from __future__ import annotations

import argparse
import contextlib
import json
import math
import os
import sys
import threading
import time
import traceback
from collections.abc import Iterator
from pathlib import Path
from typing import Any, TextIO

from robusttomo._version import __version__
from robusttomo.errors import DataError

_PROG = "robusttomo"
EXIT_OK, EXIT_INTERNAL, EXIT_INPUT, EXIT_REQUIREMENT = 0, 1, 2, 3


class _InputError(Exception):
    """Bad input found by the command line itself or while reading inputs (exit status 2)."""


# ---- progress display -----------------------------------------------------------------------
class _Progress:
    """One self-redrawing status line on a stream: a bar when the total is known, else a spinner.

    Drawn only when ``enabled`` (the command line passes ``not --quiet and stderr.isatty()``),
    so logs and pipes never receive control characters.  A background thread redraws the line
    every ``interval`` seconds so the elapsed time moves during long library calls.
    """

    _SPIN = "|/-\\"

    def __init__(self, *, enabled: bool, stream: TextIO, interval: float = 0.2, width: int = 24) -> None:
        self.enabled = enabled
        self.stream = stream
        self.interval = interval
        self.width = width
        self._label = ""
        self._done = 0
        self._total = 0
        self._start = time.monotonic()
        self._tick = 0
        self._lock = threading.Lock()
        self._stop: threading.Event | None = None
        self._thread: threading.Thread | None = None
        self._last_len = 0

    # drawing
    def _line(self, *, final: bool = False) -> str:
        elapsed = time.monotonic() - self._start
        if self._total > 1:
            frac = min(max(self._done / self._total, 0.0), 1.0)
            full = int(round(frac * self.width))
            bar = "#" * full + "-" * (self.width - full)
            return f"{self._label} [{bar}] {self._done}/{self._total}  {elapsed:5.1f} s"
        spin = "done" if final else self._SPIN[self._tick % len(self._SPIN)]
        return f"{self._label} {spin}  {elapsed:5.1f} s"

    def _draw(self) -> None:
        with self._lock:
            line = self._line()
            pad = " " * max(self._last_len - len(line), 0)
            self.stream.write("\r" + line + pad)
            self.stream.flush()
            self._last_len = len(line)
            self._tick += 1

    def _run(self) -> None:
        assert self._stop is not None
        while not self._stop.wait(self.interval):
            self._draw()

    # use
    def start(self, label: str, total: int = 0) -> None:
        """Begin a step (``total > 1`` draws a bar; otherwise a spinner)."""
        if not self.enabled:
            return
        if self._thread is not None and self._label != label:
            self.finish()
        with self._lock:
            self._label, self._done, self._total = label, 0, int(total)
            if self._thread is None:
                self._start = time.monotonic()
        if self._thread is None:
            self._stop = threading.Event()
            self._thread = threading.Thread(target=self._run, daemon=True)
            self._thread.start()
        self._draw()

    def update(self, done: int, total: int | None = None) -> None:
        """Set the number of finished units of the current step."""
        if not self.enabled:
            return
        with self._lock:
            self._done = int(done)
            if total is not None:
                self._total = int(total)
        self._draw()

    def finish(self) -> None:
        """End the current step: leave its final line (with the elapsed time) on the stream."""
        if not self.enabled or self._thread is None:
            return
        assert self._stop is not None
        self._stop.set()
        self._thread.join()
        self._thread = None
        with self._lock:
            if self._total > 1:
                self._done = self._total
            line = self._line(final=True)
            pad = " " * max(self._last_len - len(line), 0)
            self.stream.write("\r" + line + pad + "\n")
            self.stream.flush()
            self._last_len = 0

    @contextlib.contextmanager
    def step(self, label: str, total: int = 0) -> Iterator[None]:
        """Context manager around one step."""
        self.start(label, total)
        try:
            yield
        finally:
            self.finish()

    def callback(self, stage: str, done: int, total: int) -> None:
        """``progress(stage, done, total)`` hook for library calls such as ``analyze``."""
        if not self.enabled:
            return
        if stage != self._label or self._thread is None:
            self.start(stage, total)
        self.update(done, total)

    def close(self) -> None:
        """Finish whatever step is still drawn."""
        self.finish()


def _progress(args: argparse.Namespace) -> _Progress:
    stream = sys.stderr
    enabled = not args.quiet and bool(getattr(stream, "isatty", lambda: False)())
    return _Progress(enabled=enabled, stream=stream)


# ---- helpers --------------------------------------------------------------------------------
def _say(args: argparse.Namespace, text: str) -> None:
    """Human-readable result text on stdout (suppressed by --json, which prints JSON instead)."""
    if not args.json:
        sys.stdout.write(text if text.endswith("\n") else text + "\n")


def _emit_json(args: argparse.Namespace, doc: Any) -> None:
    if args.json:
        sys.stdout.write(json.dumps(doc, indent=1, allow_nan=False, default=str) + "\n")


@contextlib.contextmanager
def _reading(what: str) -> Iterator[None]:
    """Turn any input-handling failure into one line naming the input."""
    try:
        yield
    except (DataError, FileExistsError) as err:  # these name their file already
        raise _InputError(str(err)) from None
    except (ValueError, TypeError, FileNotFoundError, OSError) as err:
        raise _InputError(f"{what}: {err}") from None


def _int_list(option: str, text: str) -> list[int]:
    try:
        vals = [int(t) for t in text.split(",") if t.strip()]
    except ValueError:
        raise _InputError(f"{option}: expected comma-separated integers such as 1,2,3,8; got {text!r}") from None
    if not vals:
        raise _InputError(f"{option}: expected comma-separated integers such as 1,2,3,8; got {text!r}")
    return vals


def _check_outputs(args: argparse.Namespace, *paths: str | os.PathLike[str]) -> None:
    """Refuse existing outputs (unless --force) before any work is done."""
    from robusttomo import _io

    for p in paths:
        with _reading(f"output {p}"):
            _io.check_output_path(p, force=args.force)


def _load_plan(path: str) -> Any:
    from robusttomo.plan import load_plan

    with _reading(f"plan file {path}"):
        return load_plan(path)


def _load_counts_for(plan: Any, plan_path: str, counts_path: str) -> Any:
    from robusttomo.counts import load_counts

    with _reading(f"counts file {counts_path}"):
        counts = load_counts(counts_path)
    if counts.plan_fingerprint != plan.fingerprint:
        raise _InputError(f"{counts_path}: field 'plan_fingerprint' ({counts.plan_fingerprint[:12]}...) does not match "
                          f"the plan {plan_path} (fingerprint {plan.fingerprint[:12]}...); use the counts taken "
                          "with this plan")
    return counts


def _load_result(path: str) -> Any:
    from robusttomo.assess import load_reconstruction

    with _reading(f"result file {path}"):
        return load_reconstruction(path)


def _plan_facts(plan: Any) -> dict[str, Any]:
    return {
        "fingerprint": plan.fingerprint, "n_qubits": plan.n_qubits, "n_sequences": int(plan.n_sequences),
        "shots": plan.shots, "seed": plan.seed,
        "interleave": None if plan.interleave is None else plan.interleave.label,
        "blocks": [{"kind": b.kind.value, "length": b.length, "sequences": b.n_sequences} for b in plan.blocks],
    }


# ---- subcommands ----------------------------------------------------------------------------
def _cmd_plan(args: argparse.Namespace) -> int:
    from robusttomo.plan import InterleavedGate, export_qasm, make_plan, save_plan

    lengths = None if args.lengths is None else _int_list("--lengths", args.lengths)
    sequences: Any = None
    if args.sequences is not None:
        seqs = _int_list("--sequences", args.sequences)
        sequences = seqs[0] if len(seqs) == 1 else seqs
    if args.interleave is not None and args.interleave_unitary is not None:
        raise _InputError("give either --interleave NAME or --interleave-unitary FILE, not both")
    if args.label is not None and args.interleave_unitary is None:
        raise _InputError("--label names a gate read with --interleave-unitary FILE")
    if args.no_reference and args.interleave is None and args.interleave_unitary is None:
        raise _InputError("--no-reference needs an interleaved gate (--interleave or --interleave-unitary)")
    _check_outputs(args, args.output)
    gate: Any = args.interleave
    if args.interleave_unitary is not None:
        with _reading(f"unitary file {args.interleave_unitary}"):
            gate = InterleavedGate.from_file(args.interleave_unitary, label=args.label)
    with _reading("plan options"):
        plan = make_plan(n_qubits=args.qubits, lengths=lengths, sequences=sequences, shots=args.shots,
                         seed=args.seed, interleave=gate, include_reference=not args.no_reference)
    qasm: list[Path] = []
    if args.qasm is not None:
        prog = _progress(args)
        with prog.step("writing OpenQASM 3 programs"):
            qasm = export_qasm(plan, args.qasm, bundle=args.qasm_bundle, force=args.force)
    prediction = None
    if args.predict:
        from robusttomo.planner import assumed_device, predict
        from robusttomo.simulate import load_device

        if args.assume_device is not None:
            with _reading(f"device file {args.assume_device}"):
                device = load_device(args.assume_device)
            if device.n_qubits != plan.n_qubits:
                raise _InputError(f"{args.assume_device}: field 'n_qubits' is {device.n_qubits} but the plan has "
                                  f"{plan.n_qubits} qubit(s)")
        else:
            with _reading("--assume-error/--assume-spam"):
                device = assumed_device(plan.n_qubits, average_error=args.assume_error,
                                        readout_error=args.assume_spam)
        with _reading("prediction options"):
            costs = {"seconds_per_shot": args.seconds_per_shot, "seconds_per_sequence": args.seconds_per_sequence}
            prog = _progress(args)
            with prog.step("predicting the precision of the plan"):
                prediction = predict(plan, device, seed=args.seed, costs=costs)
    save_plan(plan, args.output, force=args.force)
    if prediction is not None:
        from robusttomo.planner import attach_prediction, format_prediction

        attach_prediction(args.output, prediction, force=True)  # the plan file was just written by us
        if not args.json:
            print(format_prediction(prediction))
    facts = _plan_facts(plan)
    kinds = ", ".join(f"{b['kind']} m={b['length']}: {b['sequences']}" for b in facts["blocks"])
    _say(args, f"wrote {args.output}: {plan.n_qubits} qubit(s), {plan.n_sequences} sequences ({kinds}), "
               f"{plan.shots} shots each, fingerprint {plan.fingerprint[:12]}...")
    if qasm:
        _say(args, f"wrote {len(qasm)} OpenQASM 3 file(s) to {args.qasm}")
    extra = {} if prediction is None else {"prediction": prediction.as_dict()}
    _emit_json(args, {"plan": str(args.output), **facts, "qasm": [str(p) for p in qasm], **extra})
    return EXIT_OK


def _cmd_simulate(args: argparse.Namespace) -> int:
    import dataclasses

    from robusttomo.counts import save_counts
    from robusttomo.export import load_channel
    from robusttomo.simulate import load_device, simulate

    plan = _load_plan(args.plan)
    with _reading(f"device file {args.device}"):
        device = load_device(args.device)
    changes: dict[str, Any] = {}
    for option, key in (("error_channel", "error"), ("interleaved_error_channel", "interleaved_error")):
        path = getattr(args, option)
        if path is not None:
            with _reading(f"channel file {path}"):
                changes[key] = load_channel(path)
    if changes:
        with _reading(f"device file {args.device} with the given channel files"):
            device = dataclasses.replace(device, **changes)
    if device.n_qubits != plan.n_qubits:
        raise _InputError(f"{args.device}: field 'n_qubits' is {device.n_qubits} but the plan {args.plan} has "
                          f"{plan.n_qubits} qubit(s)")
    _check_outputs(args, args.output)
    prog = _progress(args)
    with prog.step(f"simulating {plan.n_sequences} sequences"):
        counts = simulate(plan, device, seed=args.seed, exact=args.exact)
    save_counts(counts, args.output, force=args.force)
    _say(args, f"wrote {args.output}: {counts.n_sequences} sequences, "
               f"{'exact probabilities' if args.exact else f'{plan.shots} shots each'}, "
               f"device {device.fingerprint[:12]}...")
    _emit_json(args, {"counts": str(args.output), "n_sequences": counts.n_sequences, "exact": counts.exact,
                      "plan_fingerprint": counts.plan_fingerprint, "counts_fingerprint": counts.fingerprint,
                      "device_fingerprint": device.fingerprint, "seed": args.seed})
    return EXIT_OK


def _cmd_ingest(args: argparse.Namespace) -> int:
    from robusttomo.counts import ingest, save_counts

    plan = _load_plan(args.plan)
    _check_outputs(args, args.output)
    with _reading(f"results file {args.results}"):
        counts = ingest(plan, args.results, bit_order=args.bit_order, allow_missing=args.allow_missing)
    save_counts(counts, args.output, force=args.force)
    missing = [int(i) for i in counts.missing_ids]
    _say(args, f"wrote {args.output}: {counts.n_sequences} sequences"
               + (f", {len(missing)} missing (allowed)" if missing else "")
               + f", {int(counts.shots.sum())} shots in total")
    _emit_json(args, {"counts": str(args.output), "n_sequences": counts.n_sequences, "missing_ids": missing,
                      "total_shots": float(counts.shots.sum()), "plan_fingerprint": counts.plan_fingerprint,
                      "counts_fingerprint": counts.fingerprint, "bit_order": args.bit_order})
    return EXIT_OK


def _requirement(rec: Any, minimum: float | None) -> dict[str, Any] | None:
    if minimum is None:
        return None
    low = rec.figures.average_gate_fidelity.low
    passed = bool(math.isfinite(low) and low >= minimum)
    return {"min_average_gate_fidelity": minimum, "lower_end": low if math.isfinite(low) else None,
            "passed": passed}


def _check_requirement_option(args: argparse.Namespace) -> None:
    x = args.require_fidelity
    if x is None:
        return
    if not (0.0 < x <= 1.0):
        raise _InputError(f"--require-fidelity: must be an average gate fidelity in (0, 1]; got {x}")
    if args.bootstrap < 1:
        raise _InputError("--require-fidelity needs an interval: use --bootstrap with at least 1 replicate "
                          f"(got {args.bootstrap})")


def _cmd_analyze(args: argparse.Namespace) -> int:
    from robusttomo.assess import analyze, save_reconstruction
    from robusttomo.report import report_summary, summary_table

    if args.bootstrap < 0:
        raise _InputError(f"--bootstrap: must be a non-negative integer; got {args.bootstrap}")
    if args.jobs < 1:
        raise _InputError(f"--jobs: must be a positive integer; got {args.jobs}")
    _check_requirement_option(args)
    plan = _load_plan(args.plan)
    counts = _load_counts_for(plan, args.plan, args.counts)
    reference = None
    if args.reference is not None:
        ref_plan = _load_plan(args.reference[0])
        reference = (ref_plan, _load_counts_for(ref_plan, args.reference[0], args.reference[1]))
    _check_outputs(args, args.output)
    if plan.n_qubits >= 3 and ((args.bootstrap > 0 and not args.no_refits) or not args.no_ranges
                               or not args.no_models):
        # each replicate, range program and model fit costs about as much as the point fit
        sys.stderr.write(f"{_PROG} analyze: note: three qubits: the point fit takes minutes and several GB, and "
                         "every bootstrap replicate, range program and model fit about as much again; for the "
                         "point estimate alone use --no-refits --no-ranges --no-models (the fidelities keep their "
                         "intervals)\n")
    prog = _progress(args)
    try:
        rec = analyze(plan, counts, reference=reference, bootstrap=args.bootstrap, seed=args.seed,
                      jobs=args.jobs, models=not args.no_models, ranges=not args.no_ranges,
                      refits=not args.no_refits, progress=prog.callback)
    finally:
        prog.close()
    save_reconstruction(rec, args.output, force=args.force)
    req = _requirement(rec, args.require_fidelity)
    _say(args, summary_table(rec) + f"wrote {args.output}")
    _emit_json(args, {"result": str(args.output), "summary": report_summary(rec), "requirement": req})
    if req is not None and not req["passed"]:
        low = rec.figures.average_gate_fidelity.low
        sys.stderr.write(f"{_PROG} analyze: requirement failed: the lower end of the 95% interval of the "
                         f"average gate fidelity ({low:.6f}) is below {args.require_fidelity}\n")
        return EXIT_REQUIREMENT
    return EXIT_OK


def _cmd_report(args: argparse.Namespace) -> int:
    from robusttomo.report import write_report

    rec = _load_result(args.result)
    plan = None if args.plan is None else _load_plan(args.plan)
    if plan is not None and plan.fingerprint != rec.plan_fingerprint:
        raise _InputError(f"{args.plan}: the plan's fingerprint ({plan.fingerprint[:12]}...) differs from field "
                          f"'plan_fingerprint' of {args.result} ({rec.plan_fingerprint[:12]}...)")
    prog = _progress(args)
    with prog.step("writing the report"):
        files = write_report(rec, args.output, force=args.force, plan=plan)
    _say(args, f"wrote the report: {files.html}\n"
               f"      summary:    {files.summary}\n"
               f"      figures:    {', '.join(p.name for p in files.figures)}")
    _emit_json(args, {"report": str(files.html), "summary": str(files.summary),
                      "figures": [str(p) for p in files.figures]})
    return EXIT_OK


def _cmd_export(args: argparse.Namespace) -> int:
    from robusttomo.export import export_reconstruction

    rec = _load_result(args.result)
    _check_outputs(args, args.output)
    path = export_reconstruction(rec, args.output, format=args.format, operation=args.operation, force=args.force)
    _say(args, f"wrote {path}: {args.operation} of target {rec.target_label} as {args.format}")
    _emit_json(args, {"channel": str(path), "format": args.format, "operation": args.operation,
                      "target": rec.target_label, "n_qubits": rec.n_qubits})
    return EXIT_OK


def _cmd_demo(args: argparse.Namespace) -> int:
    from robusttomo.demo import run_demo

    if args.bootstrap is not None and args.bootstrap < 1:
        raise _InputError(f"--bootstrap: must be a positive integer; got {args.bootstrap}")
    if args.jobs < 1:
        raise _InputError(f"--jobs: must be a positive integer; got {args.jobs}")
    prog = _progress(args)
    try:
        run = run_demo(args.output, force=args.force, bootstrap=args.bootstrap, jobs=args.jobs,
                       progress=prog.callback)
    finally:
        prog.close()
    from robusttomo.report import summary_table

    lines = [summary_table(run.reconstruction).rstrip("\n"), "",
             "scenario: " + run.scenario, "true values of the invented gate error:"]
    for key, value in run.truth.items():
        lines.append(f"  {key.replace('_', ' ')}: {value:.6f}")
    lines += ["", f"report: {run.report.html}", f"finished in {run.elapsed:.1f} s"]
    _say(args, "\n".join(lines))
    from robusttomo.report import report_summary

    _emit_json(args, {"report": str(run.report.html), "summary": str(run.report.summary),
                      "result": str(run.result), "elapsed_seconds": run.elapsed, "truth": dict(run.truth),
                      "figures": report_summary(run.reconstruction)["average_gate_fidelity"]})
    return EXIT_OK


# ---- parser ---------------------------------------------------------------------------------
class _Parser(argparse.ArgumentParser):
    """argparse with one-line usage errors (exit status 2)."""

    def error(self, message: str) -> None:  # type: ignore[override]
        self.exit(EXIT_INPUT, f"{self.prog}: error: {message} (see '{self.prog} --help')\n")


_EXAMPLES = {
    "plan": "robusttomo plan --qubits 2 --lengths 1,2,3,8,16 --sequences 200 --shots 100 --seed 7 "
            "--interleave cz -o plan.h5 --qasm programs/",
    "simulate": "robusttomo simulate plan.h5 --device device.json --seed 11 -o counts.h5",
    "ingest": "robusttomo ingest plan.h5 results.csv -o counts.h5 --bit-order q0-right",
    "analyze": "robusttomo analyze plan.h5 counts.h5 -o result.h5 --bootstrap 200 --seed 3 --require-fidelity 0.99",
    "report": "robusttomo report result.h5 -o report/",
    "export": "robusttomo export result.h5 --format kraus-json -o cz-error.json",
    "demo": "robusttomo demo -o demo-report",
    "batch": "robusttomo batch manifest.json -o device-run/ --jobs 4",
    "compare": "robusttomo compare old-run/ new-run/ -o changes/",
}


def _common(p: argparse.ArgumentParser) -> None:
    g = p.add_argument_group("common options")
    g.add_argument("--force", action="store_true", help="overwrite existing outputs")
    g.add_argument("--quiet", action="store_true", help="no progress display on stderr")
    g.add_argument("--json", action="store_true", help="print machine-readable JSON on stdout")
    g.add_argument("--debug", action="store_true", help="show the traceback of an internal error")


def _parser() -> argparse.ArgumentParser:
    p = _Parser(
        prog=_PROG,
        description="SPAM-robust error-channel reconstruction from random Clifford sequences.",
        epilog="steps: plan -> simulate (or run on hardware and ingest) -> analyze -> report / export.\n"
               "example: robusttomo demo -o demo-report\n"
               "exit status: 0 success, 1 internal error, 2 bad input or usage, 3 failed requirement.",
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    p.add_argument("--version", action="version", version=f"robusttomo {__version__}")
    sub = p.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)

    def add(name: str, help_text: str) -> argparse.ArgumentParser:
        sp = sub.add_parser(name, help=help_text.replace("%", "%%"), description=help_text,
                            epilog=f"example:\n  {_EXAMPLES[name]}",
                            formatter_class=argparse.RawDescriptionHelpFormatter)
        return sp

    sp = add("plan", "draw the random Clifford sequences of an experiment and write the plan file")
    sp.add_argument("--qubits", type=int, required=True, help="number of qubits (1, 2 or 3)")
    sp.add_argument("--lengths", help="comma-separated sequence lengths, must include 1 and 2 "
                                      "(default depends on --qubits)")
    sp.add_argument("--sequences", help="sequences per length: one number, or one per length (comma-separated)")
    sp.add_argument("--shots", type=int, help="shots per sequence (default 100)")
    sp.add_argument("--seed", type=int, required=True, help="seed of the random draw (non-negative)")
    sp.add_argument("--interleave", metavar="GATE", help="interleaved gate by name, e.g. cz, cx, iswap, h")
    sp.add_argument("--interleave-unitary", metavar="FILE", help="interleaved gate as a unitary in a file")
    sp.add_argument("--label", help="label of the gate read with --interleave-unitary")
    sp.add_argument("--no-reference", action="store_true",
                    help="interleaved sequences only (the reference run is given separately to analyze)")
    sp.add_argument("-o", "--output", required=True, metavar="PLAN.h5", help="plan file to write")
    sp.add_argument("--qasm", metavar="DIR", help="also write the OpenQASM 3 programs into DIR")
    sp.add_argument("--qasm-bundle", action="store_true", help="one bundle file plus an index instead of one file "
                                                               "per sequence")
    sp.add_argument("--predict", action="store_true",
                    help="predict the precision this plan delivers (stored in the plan file, printed as a table)")
    sp.add_argument("--assume-device", metavar="DEVICE.json",
                    help="device description the prediction assumes (default: --assume-error and --assume-spam)")
    sp.add_argument("--assume-error", type=float, default=0.01,
                    help="assumed average gate error for --predict without a device file (default 0.01)")
    sp.add_argument("--assume-spam", type=float, default=0.02,
                    help="assumed readout error per qubit for --predict without a device file (default 0.02)")
    sp.add_argument("--seconds-per-shot", type=float, default=1e-4,
                    help="device seconds per shot, for the device-time estimate (default 1e-4)")
    sp.add_argument("--seconds-per-sequence", type=float, default=0.05,
                    help="device seconds to load a new sequence, for the device-time estimate (default 0.05)")
    _common(sp)
    sp.set_defaults(func=_cmd_plan)

    sp = add("simulate", "run a plan on a synthetic device (exact density-matrix simulation)")
    sp.add_argument("plan", metavar="PLAN.h5")
    sp.add_argument("--device", required=True, metavar="DEVICE.json", help="device description (JSON)")
    sp.add_argument("--seed", type=int, required=True, help="seed of the shot sampling")
    sp.add_argument("-o", "--output", required=True, metavar="COUNTS.h5")
    sp.add_argument("--exact", action="store_true", help="exact probabilities times shots instead of sampling")
    sp.add_argument("--error-channel", metavar="CHANNEL", help="exported channel file (robusttomo export) to use "
                                                               "as the error after every Clifford")
    sp.add_argument("--interleaved-error-channel", metavar="CHANNEL",
                    help="exported channel file to use as the interleaved gate's error")
    _common(sp)
    sp.set_defaults(func=_cmd_simulate)

    sp = add("ingest", "turn hardware results (CSV or JSON) into a validated counts file")
    sp.add_argument("plan", metavar="PLAN.h5")
    sp.add_argument("results", metavar="RESULTS", help="CSV (sequence_id,bitstring,count) or JSON results")
    sp.add_argument("-o", "--output", required=True, metavar="COUNTS.h5")
    sp.add_argument("--bit-order", choices=("q0-left", "q0-right"), default="q0-left",
                    help="which end of a bitstring is qubit 0 (default q0-left)")
    sp.add_argument("--allow-missing", action="store_true", help="accept plan sequences without data")
    _common(sp)
    sp.set_defaults(func=_cmd_ingest)

    sp = add("analyze", "reconstruct the error channel and its figures of merit with 95% intervals")
    sp.add_argument("plan", metavar="PLAN.h5")
    sp.add_argument("counts", metavar="COUNTS.h5")
    sp.add_argument("-o", "--output", required=True, metavar="RESULT.h5")
    sp.add_argument("--bootstrap", type=int, default=200, help="bootstrap replicates (default 200; 0: no intervals)")
    sp.add_argument("--seed", type=int, help="seed of the bootstrap")
    sp.add_argument("--jobs", type=int, default=1,
                    help="worker processes for the range programs, bootstrap re-fits and models (default 1)")
    sp.add_argument("--reference", nargs=2, metavar=("REF_PLAN.h5", "REF_COUNTS.h5"),
                    help="separate reference run for an interleaved plan without reference sequences")
    sp.add_argument("--require-fidelity", type=float, metavar="X",
                    help="exit with status 3 when the lower end of the 95%% interval of the average gate "
                         "fidelity is below X")
    sp.add_argument("--no-models", action="store_true", help="skip the reduced models (faster)")
    sp.add_argument("--no-refits", action="store_true",
                    help="bootstrap the decays only, no CPTP re-fit per replicate (much faster; only the "
                         "fidelities keep their intervals)")
    sp.add_argument("--no-ranges", action="store_true",
                    help="skip the ranges over the channels consistent with the data (faster; the diamond "
                         "distance then gets the bootstrap interval)")
    _common(sp)
    sp.set_defaults(func=_cmd_analyze)

    sp = add("report", "write the HTML report, the JSON summary and the PNG figures of a result")
    sp.add_argument("result", metavar="RESULT.h5")
    sp.add_argument("-o", "--output", required=True, metavar="DIR")
    sp.add_argument("--plan", metavar="PLAN.h5", help="the plan, for the 'what was run' table")
    _common(sp)
    sp.set_defaults(func=_cmd_report)

    from robusttomo.export import FORMATS, OPERATIONS

    sp = add("export", "write the estimated channel for simulators")
    sp.add_argument("result", metavar="RESULT.h5")
    sp.add_argument("--format", required=True, choices=tuple(FORMATS),
                    help="; ".join(f"{k}: {v}" for k, v in FORMATS.items()))
    sp.add_argument("-o", "--output", required=True, metavar="FILE")
    sp.add_argument("--operation", choices=OPERATIONS, default="error",
                    help="error: the error channel after the ideal gate (default); noisy-gate: error o gate")
    _common(sp)
    sp.set_defaults(func=_cmd_export)

    sp = add("demo", "analyze the shipped, invented example data and write its report")
    sp.add_argument("-o", "--output", default="robusttomo-demo", metavar="DIR",
                    help="output directory (default ./robusttomo-demo)")
    sp.add_argument("--bootstrap", type=int, help="bootstrap replicates (default: the scenario's own)")
    sp.add_argument("--jobs", type=int, default=1, help="worker processes for the bootstrap (default 1)")
    _common(sp)
    sp.set_defaults(func=_cmd_demo)
    _add_batch_commands(add)
    return p


# ---- batch and compare (robusttomo.batch, robusttomo.compare) --------------------------------
def _cmd_batch(args: argparse.Namespace) -> int:
    from robusttomo.batch import JobStatus, load_manifest, run_batch

    if args.jobs < 1:
        raise _InputError(f"--jobs: must be a positive integer; got {args.jobs}")
    with _reading(f"manifest {args.manifest}"):
        manifest = load_manifest(args.manifest)
    prog = _progress(args)
    try:
        res = run_batch(manifest, args.output, jobs=args.jobs, cluster=args.cluster, force=args.force,
                        replicate_groups=args.replicate_groups, progress=prog.callback)
    finally:
        prog.close()
    counts = {s: sum(o.status is s for o in res.outcomes) for s in JobStatus}
    _say(args, f"batch of {len(res.outcomes)} job(s): {counts[JobStatus.DONE]} analysed, "
               f"{counts[JobStatus.SKIPPED]} skipped (result up to date), {counts[JobStatus.FAILED]} failed "
               f"in {res.elapsed:.1f} s\nsummary: {res.csv}, {res.html}, {res.figure}")
    for o in res.outcomes:
        if o.status is JobStatus.FAILED:
            sys.stderr.write(f"{_PROG} batch: job {o.label} failed: {o.error}\n")
    _emit_json(args, {"summary_csv": str(res.csv), "summary_json": str(res.json), "summary_html": str(res.html),
                      "figure": str(res.figure), "elapsed_seconds": res.elapsed,
                      "jobs": [{"label": o.label, "status": o.status.value, "error": o.error,
                                "result": None if o.result is None else str(o.result)} for o in res.outcomes]})
    return EXIT_INPUT if counts[JobStatus.FAILED] else EXIT_OK


def _cmd_compare(args: argparse.Namespace) -> int:
    from robusttomo.compare import compare, write_comparison

    with _reading(f"inputs {args.old} and {args.new}"):
        comp = compare(args.old, args.new)
    pj, ph = write_comparison(comp, args.output, force=args.force)
    lines = [f"{'gate':<16} {'fidelity change [95%]':<36} {'channel distance':>16}  flag"]
    for g in comp.gates:
        f = g.fidelity
        lines.append(f"{g.label:<16} {f'{f.delta:+.5f} [{f.low:+.5f}, {f.high:+.5f}]':<36} "
                     f"{g.channel_distance:>16.5f}  {'CHANGED' if g.flagged else ''}")
    _say(args, "\n".join(lines) + f"\nwrote {pj} and {ph}")
    _emit_json(args, comp.as_dict())
    return EXIT_OK


def _add_batch_commands(add: Any) -> None:
    sp = add("batch", "analyse every gate of a batch manifest (resumable) and write the device summary")
    sp.add_argument("manifest", metavar="MANIFEST.json", help="batch manifest (see docs/batch.md)")
    sp.add_argument("-o", "--output", required=True, metavar="DIR", help="batch output directory (a rerun into "
                                                                        "the same directory resumes)")
    sp.add_argument("--jobs", type=int, default=os.cpu_count() or 1,
                    help="local worker processes (default: number of CPUs)")
    sp.add_argument("--cluster", metavar="ADDRESS", help="run the jobs on a running Dask scheduler, e.g. "
                                                         "tcp://10.0.0.5:8786 (extra 'cluster')")
    sp.add_argument("--replicate-groups", type=int, default=None, metavar="N",
                    help="with --cluster: split each job's bootstrap replicates into N work units (1: whole "
                         "jobs; default: automatic, ceil(worker threads / jobs) when the cluster has more "
                         "threads than jobs)")
    _common(sp)
    sp.set_defaults(func=_cmd_batch)

    sp = add("compare", "what changed between two results or two batch directories")
    sp.add_argument("old", metavar="OLD", help="result file or batch directory")
    sp.add_argument("new", metavar="NEW", help="result file or batch directory")
    sp.add_argument("-o", "--output", required=True, metavar="DIR", help="directory for compare.json and "
                                                                        "compare.html")
    _common(sp)
    sp.set_defaults(func=_cmd_compare)


def _one_line(err: BaseException) -> str:
    text = " ".join(str(err).split())
    return text or type(err).__name__


def main(argv: list[str] | None = None) -> int:
    """Entry point of ``robusttomo``; returns the exit status (0, 1, 2 or 3).

    Parameters
    ----------
    argv : list of str, optional
        Arguments without the program name; default ``sys.argv[1:]``.

    Returns
    -------
    int
        0 success, 1 internal error, 2 bad input or usage, 3 failed requirement.
    """
    parser = _parser()
    try:
        args = parser.parse_args(argv)
    except SystemExit as exc:  # --help, --version, usage errors
        code = exc.code
        return code if isinstance(code, int) else (EXIT_OK if code is None else EXIT_INPUT)
    if args.command is None:
        parser.print_help()
        return EXIT_OK
    where = f"{_PROG} {args.command}"
    try:
        return int(args.func(args))
    except _InputError as err:
        sys.stderr.write(f"{where}: error: {_one_line(err)}\n")
        return EXIT_INPUT
    except (DataError, ValueError, FileExistsError, FileNotFoundError, OSError) as err:
        # library entry points validate their inputs and name the field; writes name their path
        if args.debug:
            traceback.print_exc()
        sys.stderr.write(f"{where}: error: {_one_line(err)}\n")
        return EXIT_INPUT
    except KeyboardInterrupt:
        sys.stderr.write(f"{where}: interrupted\n")
        return 130
    except Exception as err:  # noqa: BLE001 - the one place that turns a crash into a message
        if args.debug:
            traceback.print_exc()
        sys.stderr.write(f"{where}: internal error: {type(err).__name__}: {_one_line(err)[:300]}; "
                         "rerun with --debug for the traceback\n")
        return EXIT_INTERNAL


if __name__ == "__main__":
    sys.exit(main())
