"""End-to-end tests of the ``robusttomo`` command line on small data in a temporary directory."""

from __future__ import annotations

import csv
import importlib.util
import io
import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from robusttomo import cli
from robusttomo._version import __version__
from robusttomo.counts import load_counts
from robusttomo.export import FORMATS, load_channel
from robusttomo.plan import load_plan
from robusttomo.assess import load_reconstruction

ROOT = Path(__file__).resolve().parents[1]
SUBCOMMANDS = ("plan", "simulate", "ingest", "analyze", "report", "export", "demo")

DEVICE_1Q = {
    "schema_version": 1, "n_qubits": 1,
    "error_parts": [{"type": "rotation", "pauli": "Z", "angle": 0.1}, {"type": "amplitude_damping", "gamma": 0.02}],
    "readout": [[0.02, 0.03]], "prep_flip": [0.01],
}


def run(capsys, *argv: str) -> tuple[int, str, str]:
    code = cli.main(list(argv))
    out, err = capsys.readouterr()
    return code, out, err


def one_error_line(err: str) -> str:
    lines = [ln for ln in err.splitlines() if ln.strip()]
    assert len(lines) == 1, err
    assert "Traceback" not in err
    return lines[0]


@pytest.fixture(scope="module")
def work(tmp_path_factory):
    """plan -> simulate -> analyze on a small one-qubit experiment, through the command line."""
    d = tmp_path_factory.mktemp("cli")
    (d / "device.json").write_text(json.dumps(DEVICE_1Q))
    assert cli.main(["plan", "--qubits", "1", "--lengths", "1,2,3,6,12", "--sequences", "40", "--shots", "100",
                     "--seed", "3", "-o", str(d / "plan.h5"), "--qasm", str(d / "qasm"), "--quiet"]) == 0
    assert cli.main(["simulate", str(d / "plan.h5"), "--device", str(d / "device.json"), "--seed", "4",
                     "-o", str(d / "counts.h5"), "--quiet"]) == 0
    assert cli.main(["analyze", str(d / "plan.h5"), str(d / "counts.h5"), "-o", str(d / "result.h5"),
                     "--bootstrap", "5", "--seed", "1", "--quiet"]) == 0
    return d


# ---- basics -------------------------------------------------------------------------------------
def test_version(capsys):
    code, out, _ = run(capsys, "--version")
    assert code == 0 and out.strip() == f"robusttomo {__version__}"


@pytest.mark.parametrize("sub", SUBCOMMANDS)
def test_help_has_an_example(capsys, sub):
    code, out, _ = run(capsys, sub, "--help")
    assert code == 0
    assert "example:" in out and f"robusttomo {sub}" in out.split("example:")[1]


def test_no_command_prints_help(capsys):
    code, out, _ = run(capsys)
    assert code == 0 and "plan" in out and "demo" in out


def test_console_script_entry_point():
    # The installed program and `python -m robusttomo.cli` behave as main().
    res = subprocess.run([sys.executable, "-m", "robusttomo.cli", "--version"], capture_output=True, text=True,
                         timeout=60)
    assert res.returncode == 0 and res.stdout.strip() == f"robusttomo {__version__}"


# ---- every step end to end ------------------------------------------------------------------------
def test_plan_outputs(work):
    plan = load_plan(work / "plan.h5")
    assert plan.n_qubits == 1 and plan.n_sequences == 200 and plan.shots == 100 and plan.seed == 3
    programs = sorted((work / "qasm").glob("*.qasm"))
    assert len(programs) == 200
    assert programs[0].read_text().startswith("OPENQASM 3")


def test_plan_json(capsys, tmp_path):
    code, out, _ = run(capsys, "plan", "--qubits", "2", "--lengths", "1,2,4", "--sequences", "5,6,7",
                       "--seed", "1", "--interleave", "cz", "-o", str(tmp_path / "p.h5"), "--json")
    assert code == 0
    doc = json.loads(out)
    assert doc["n_qubits"] == 2 and doc["interleave"] == "cz" and doc["n_sequences"] == 36
    assert [b["sequences"] for b in doc["blocks"]] == [5, 6, 7, 5, 6, 7]
    assert doc["fingerprint"] == load_plan(tmp_path / "p.h5").fingerprint


def test_simulate_and_ingest_round_trip(capsys, work, tmp_path):
    counts = load_counts(work / "counts.h5")
    plan = load_plan(work / "plan.h5")
    assert counts.plan_fingerprint == plan.fingerprint and counts.n_sequences == 200
    # write the counts as a hardware-style CSV (qubit 0 rightmost) and ingest it back
    csv_path = tmp_path / "results.csv"
    with csv_path.open("w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(["sequence_id", "bitstring", "count"])
        for sid, row in zip(counts.sequence_ids, counts.counts):
            for x, c in enumerate(row):
                if c:
                    w.writerow([int(sid), format(x, "01b")[::-1], int(c)])
    code, out, _ = run(capsys, "ingest", str(work / "plan.h5"), str(csv_path), "-o", str(tmp_path / "c.h5"),
                       "--bit-order", "q0-right", "--json")
    assert code == 0
    doc = json.loads(out)
    assert doc["n_sequences"] == 200 and doc["missing_ids"] == [] and doc["total_shots"] == 200 * 100
    back = load_counts(tmp_path / "c.h5")
    assert np.array_equal(back.counts, counts.counts)


def test_simulate_json(capsys, work, tmp_path):
    code, out, _ = run(capsys, "simulate", str(work / "plan.h5"), "--device", str(work / "device.json"),
                       "--seed", "4", "-o", str(tmp_path / "c.h5"), "--json")
    assert code == 0
    doc = json.loads(out)
    assert doc["counts_fingerprint"] == load_counts(work / "counts.h5").fingerprint  # same seed, same data


def test_analyze_prints_table_and_json(capsys, work, tmp_path):
    code, out, _ = run(capsys, "analyze", str(work / "plan.h5"), str(work / "counts.h5"),
                       "-o", str(tmp_path / "r.h5"), "--bootstrap", "5", "--seed", "1", "--quiet")
    assert code == 0
    assert "average gate fidelity" in out and "95% interval" in out and "diamond distance range" in out
    code, out, _ = run(capsys, "analyze", str(work / "plan.h5"), str(work / "counts.h5"),
                       "-o", str(tmp_path / "r2.h5"), "--bootstrap", "5", "--seed", "1", "--json", "--quiet")
    assert code == 0
    doc = json.loads(out)
    agf = doc["summary"]["average_gate_fidelity"]
    assert agf["ci95"][0] <= agf["value"] <= agf["ci95"][1]
    assert doc["requirement"] is None and doc["result"] == str(tmp_path / "r2.h5")


def test_analyze_without_ranges_and_refits(capsys, work, tmp_path):
    code, out, _ = run(capsys, "analyze", str(work / "plan.h5"), str(work / "counts.h5"), "-o",
                       str(tmp_path / "n.h5"), "--bootstrap", "5", "--seed", "1", "--no-ranges", "--no-models",
                       "--no-refits", "--quiet")
    assert code == 0
    rec = load_reconstruction(tmp_path / "n.h5")
    assert np.all(np.isnan(rec.nonunital_ranges))
    assert "not computed (ranges=False)" in rec.figures.diamond_distance_range.method
    assert "[n/a, n/a]" in [ln for ln in out.splitlines() if ln.startswith("diamond distance range")][0]
    # decay bootstrap only: the fidelity keeps its interval, the unitarity has none
    assert rec.options["refits"] is False and np.isfinite(rec.figures.average_gate_fidelity.low)
    assert np.isnan(rec.figures.unitarity.low)


def test_require_fidelity_exit_status(capsys, work, tmp_path):
    code, _, err = run(capsys, "analyze", str(work / "plan.h5"), str(work / "counts.h5"), "-o",
                       str(tmp_path / "a.h5"), "--bootstrap", "5", "--seed", "1", "--require-fidelity", "0.9999",
                       "--quiet")
    assert code == 3
    assert "requirement failed" in one_error_line(err)
    assert (tmp_path / "a.h5").is_file()  # the result is kept for inspection
    code, out, _ = run(capsys, "analyze", str(work / "plan.h5"), str(work / "counts.h5"), "-o",
                       str(tmp_path / "b.h5"), "--bootstrap", "5", "--seed", "1", "--require-fidelity", "0.5",
                       "--json", "--quiet")
    assert code == 0 and json.loads(out)["requirement"]["passed"] is True
    code, _, err = run(capsys, "analyze", str(work / "plan.h5"), str(work / "counts.h5"), "-o",
                       str(tmp_path / "c.h5"), "--bootstrap", "0", "--require-fidelity", "0.5")
    assert code == 2 and "--require-fidelity needs an interval" in one_error_line(err)


def test_report(capsys, work, tmp_path):
    out_dir = tmp_path / "rep"
    code, out, _ = run(capsys, "report", str(work / "result.h5"), "-o", str(out_dir), "--plan",
                       str(work / "plan.h5"), "--json")
    assert code == 0
    doc = json.loads(out)
    assert Path(doc["report"]).is_file() and Path(doc["summary"]).is_file()
    assert {Path(p).name for p in doc["figures"]} == {"decays.png", "lambdas.png", "ptm.png", "generator.png"}
    summary = json.loads(Path(doc["summary"]).read_text())
    assert summary["n_qubits"] == 1 and summary["target"] == "identity"
    # no overwrite without --force, and nothing is changed
    before = (out_dir / "report.html").read_bytes()
    code, _, err = run(capsys, "report", str(work / "result.h5"), "-o", str(out_dir))
    assert code == 2 and "output exists" in one_error_line(err) and "report.html" in err
    assert (out_dir / "report.html").read_bytes() == before
    assert run(capsys, "report", str(work / "result.h5"), "-o", str(out_dir), "--force")[0] == 0


@pytest.mark.parametrize("fmt", list(FORMATS))
def test_export_every_format(capsys, work, tmp_path, fmt):
    from robusttomo.assess import load_reconstruction

    path = tmp_path / ("ch.npz" if fmt == "kraus-npz" else "ch.json")
    code, out, _ = run(capsys, "export", str(work / "result.h5"), "--format", fmt, "-o", str(path), "--json")
    assert code == 0 and json.loads(out)["format"] == fmt
    ch = load_channel(path)
    rec = load_reconstruction(work / "result.h5")
    if fmt == "pauli":
        assert np.allclose(np.diag(ch.ptm), np.diag(rec.error_channel.ptm), atol=1e-6)
    else:
        assert np.allclose(ch.ptm, rec.error_channel.ptm, atol=1e-6)


def test_simulate_with_exported_channel(capsys, work, tmp_path):
    ch_path = tmp_path / "err.json"
    assert run(capsys, "export", str(work / "result.h5"), "--format", "kraus-json", "-o", str(ch_path))[0] == 0
    code, _, err = run(capsys, "simulate", str(work / "plan.h5"), "--device", str(work / "device.json"),
                       "--error-channel", str(ch_path), "--seed", "5", "--exact", "-o", str(tmp_path / "c.h5"))
    assert code == 0, err
    from robusttomo.plan import load_plan as lp
    from robusttomo.simulate import Device, simulate

    direct = simulate(lp(work / "plan.h5"), Device.build(1, error=load_channel(ch_path), readout=[(0.02, 0.03)],
                                                         prep_flip=[0.01]), exact=True)
    assert np.allclose(load_counts(tmp_path / "c.h5").counts, direct.counts, atol=1e-9)


# ---- bad input: exit status 2, one line naming the file and field -----------------------------------
def test_missing_file(capsys, work, tmp_path):
    missing = tmp_path / "nope.h5"
    code, _, err = run(capsys, "simulate", str(missing), "--device", str(work / "device.json"), "--seed", "1",
                       "-o", str(tmp_path / "c.h5"))
    assert code == 2 and str(missing) in one_error_line(err)
    code, _, err = run(capsys, "report", str(tmp_path / "none.h5"), "-o", str(tmp_path / "r"))
    assert code == 2 and "none.h5" in one_error_line(err)
    assert not (tmp_path / "c.h5").exists() and not (tmp_path / "r").exists()


def test_bad_device_field(capsys, work, tmp_path):
    bad = tmp_path / "bad-device.json"
    bad.write_text(json.dumps({**DEVICE_1Q, "readout": [[0.02, 1.5]]}))
    code, _, err = run(capsys, "simulate", str(work / "plan.h5"), "--device", str(bad), "--seed", "1",
                       "-o", str(tmp_path / "c.h5"))
    line = one_error_line(err)
    assert code == 2 and str(bad) in line and "'readout'" in line
    bad.write_text(json.dumps({**DEVICE_1Q, "n_qubits": 2}))
    code, _, err = run(capsys, "simulate", str(work / "plan.h5"), "--device", str(bad), "--seed", "1",
                       "-o", str(tmp_path / "c.h5"))
    assert code == 2 and str(bad) in one_error_line(err)


def test_counts_fingerprint_mismatch(capsys, work, tmp_path):
    other = tmp_path / "other.h5"
    assert cli.main(["plan", "--qubits", "1", "--lengths", "1,2,3", "--sequences", "10", "--seed", "9",
                     "-o", str(other), "--quiet"]) == 0
    capsys.readouterr()
    counts = work / "counts.h5"
    code, _, err = run(capsys, "analyze", str(other), str(counts), "-o", str(tmp_path / "r.h5"))
    line = one_error_line(err)
    assert code == 2 and str(counts) in line and "'plan_fingerprint'" in line
    assert not (tmp_path / "r.h5").exists()


def test_existing_output_without_force(capsys, work, tmp_path):
    out = tmp_path / "plan.h5"
    out.write_text("precious")
    code, _, err = run(capsys, "plan", "--qubits", "1", "--seed", "1", "--lengths", "1,2", "--sequences", "3",
                       "-o", str(out))
    line = one_error_line(err)
    assert code == 2 and str(out) in line and "--force" in line
    assert out.read_text() == "precious"
    code, _, err = run(capsys, "analyze", str(work / "plan.h5"), str(work / "counts.h5"), "-o", str(out))
    assert code == 2 and out.read_text() == "precious"
    assert run(capsys, "plan", "--qubits", "1", "--seed", "1", "--lengths", "1,2", "--sequences", "3", "-o",
               str(out), "--force")[0] == 0
    assert load_plan(out).n_sequences == 6


@pytest.mark.parametrize("argv, needle", [
    (["plan", "--qubits", "1", "--seed", "1", "--lengths", "1,x", "-o", "p.h5"], "--lengths"),
    (["plan", "--qubits", "1", "--seed", "1", "--lengths", "2,3", "-o", "p.h5"], "'lengths' must include 1 and 2"),
    (["plan", "--qubits", "5", "--seed", "1", "-o", "p.h5"], "'n_qubits'"),
    (["plan", "--qubits", "1", "-o", "p.h5"], "--seed"),
    (["plan", "--qubits", "1", "--seed", "1", "-o", "p.h5", "--bogus"], "unrecognized arguments"),
    (["export", "r.h5", "--format", "qasm", "-o", "x"], "--format"),
    (["analyze", "p.h5", "c.h5", "-o", "r.h5", "--require-fidelity", "1.5"], "--require-fidelity"),
    (["frobnicate"], "invalid choice"),
])
def test_usage_errors(capsys, tmp_path, monkeypatch, argv, needle):
    monkeypatch.chdir(tmp_path)
    code, out, err = run(capsys, *argv)
    assert code == 2
    assert needle in one_error_line(err)
    assert list(tmp_path.iterdir()) == []


def test_internal_error_exit_1(capsys, work, tmp_path, monkeypatch):
    import robusttomo.assess

    def boom(*args, **kwargs):
        raise RuntimeError("simulated fault")

    monkeypatch.setattr(robusttomo.assess, "analyze", boom)
    argv = ["analyze", str(work / "plan.h5"), str(work / "counts.h5"), "-o", str(tmp_path / "r.h5")]
    code, _, err = run(capsys, *argv)
    line = one_error_line(err)
    assert code == 1 and "internal error" in line and "simulated fault" in line and "--debug" in line
    code, _, err = run(capsys, *argv, "--debug")
    assert code == 1 and "Traceback" in err
    assert not (tmp_path / "r.h5").exists()


# ---- progress display -------------------------------------------------------------------------------
class _TTY(io.StringIO):
    def isatty(self) -> bool:
        return True


def test_progress_bar_draws_only_when_enabled():
    stream = _TTY()
    p = cli._Progress(enabled=True, stream=stream, interval=0.01)
    p.callback("bootstrap", 0, 4)
    for i in range(1, 5):
        p.callback("bootstrap", i, 4)
    p.callback("models", 0, 1)
    p.close()
    text = stream.getvalue()
    assert "bootstrap [" in text and "] 4/4" in text and "#" * 24 in text
    assert "models done" in text and text.endswith("\n")
    quiet = _TTY()
    q = cli._Progress(enabled=False, stream=quiet)
    q.callback("bootstrap", 1, 4)
    q.close()
    assert quiet.getvalue() == ""


def test_no_progress_when_stderr_is_not_a_terminal(capsys, work, tmp_path):
    # capsys replaces stderr by a non-terminal stream: no control characters may appear
    code, _, err = run(capsys, "simulate", str(work / "plan.h5"), "--device", str(work / "device.json"),
                       "--seed", "4", "-o", str(tmp_path / "c.h5"))
    assert code == 0 and err == ""


# ---- demo ------------------------------------------------------------------------------------------
def _load_script():
    spec = importlib.util.spec_from_file_location("make_demo_data", ROOT / "scripts" / "make_demo_data.py")
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod


def test_shipped_demo_data_are_reproducible_and_small(tmp_path):
    from robusttomo.demo import DEMO_FILES, demo_data_path, load_scenario

    shipped = [demo_data_path(n) for n in DEMO_FILES]
    assert sum(p.stat().st_size for p in shipped) < 5e6
    scenario = load_scenario()
    assert scenario["invented"] is True and "INVENTED" in scenario["description"]
    assert "invented" in json.loads(demo_data_path("device.json").read_text())["description"].lower()
    plan = load_plan(demo_data_path("plan.h5"))
    counts = load_counts(demo_data_path("counts.h5"))
    assert plan.interleave is not None and plan.interleave.label == "cz" and plan.n_qubits == 2
    assert counts.plan_fingerprint == plan.fingerprint and "INVENTED" in counts.source
    # the script regenerates exactly the shipped data from its fixed seeds
    script = _load_script()
    assert script.main(["--output-dir", str(tmp_path)]) == 0
    assert load_plan(tmp_path / "plan.h5").fingerprint == plan.fingerprint
    assert load_counts(tmp_path / "counts.h5").fingerprint == counts.fingerprint
    # the true figures go through LAPACK and a convex solver (diamond distance), whose last digits
    # depend on the machine's BLAS and thread count: equal to 1e-8, not bit for bit
    again = json.loads((tmp_path / "scenario.json").read_text())["true_figures"]
    assert again.keys() == scenario["true_figures"].keys()
    for key, value in scenario["true_figures"].items():
        assert again[key] == pytest.approx(value, rel=1e-8, abs=1e-12), key


def _small_demo_data(d: Path) -> None:
    """A tiny invented interleaved data set in the shipped layout (one qubit, so the test is quick)."""
    from robusttomo.counts import save_counts
    from robusttomo.plan import make_plan, save_plan
    from robusttomo.simulate import load_device, simulate

    d.mkdir()
    device = {"schema_version": 1, "n_qubits": 1, "description": "invented test device",
              "error_parts": [{"type": "depolarizing", "p": 0.99}],
              "interleaved_error_parts": [{"type": "rotation", "pauli": "Z", "angle": 0.1}],
              "readout": [[0.02, 0.03]]}
    (d / "device.json").write_text(json.dumps(device))
    plan = make_plan(n_qubits=1, lengths=[1, 2, 3, 6], sequences=30, shots=100, seed=3, interleave="h")
    save_plan(plan, d / "plan.h5")
    save_counts(simulate(plan, load_device(d / "device.json"), seed=4), d / "counts.h5")
    (d / "scenario.json").write_text(json.dumps({
        "kind": "robusttomo-demo-scenario", "invented": True, "description": "INVENTED test scenario",
        "bootstrap": 3, "analysis_seed": 1, "true_figures": {"average_gate_fidelity": 0.998}}))


def test_demo_end_to_end_on_small_data(capsys, tmp_path, monkeypatch):
    import robusttomo.demo as demo

    data = tmp_path / "data"
    _small_demo_data(data)
    monkeypatch.setattr(demo, "_DATA_DIR", data)
    out = tmp_path / "demo-out"
    code, text, err = run(capsys, "demo", "-o", str(out), "--quiet")
    assert code == 0, err
    assert f"report: {out / 'report.html'}" in text and "invented" in text.lower()
    assert "average gate fidelity: 0.998000" in text  # the scenario's true value, shown beside the estimate
    assert "Error of gate h" in (out / "report.html").read_text()
    assert (out / "result.h5").is_file() and (out / "summary.json").is_file()
    # refuses to overwrite the directory's contents without --force, before any work
    before = (out / "report.html").read_bytes()
    code, _, err = run(capsys, "demo", "-o", str(out), "--quiet")
    assert code == 2 and "output exists" in one_error_line(err)
    assert (out / "report.html").read_bytes() == before
    code, text, _ = run(capsys, "demo", "-o", str(out), "--quiet", "--json", "--force")
    doc = json.loads(text)
    assert code == 0 and doc["report"] == str(out / "report.html") and doc["truth"]["average_gate_fidelity"] == 0.998


def test_plan_predict_stores_and_prints_the_prediction(capsys, tmp_path):
    from robusttomo.planner import load_prediction

    out = tmp_path / "p.h5"
    code, stdout, _ = run(capsys, "plan", "--qubits", "1", "--lengths", "1,2,4", "--sequences", "60",
                          "--shots", "50", "--seed", "2", "-o", str(out), "--predict", "--quiet")
    assert code == 0 and "Predicted precision" in stdout and "decay_fidelity" in stdout
    assert load_plan(out).n_sequences == 180
    pred = load_prediction(out)
    assert pred.as_dict()["figures"]  # the stored table is readable back
    code, _, err = run(capsys, "plan", "--qubits", "1", "--lengths", "1,2", "--sequences", "10", "--seed", "2",
                       "-o", str(tmp_path / "q.h5"), "--predict", "--assume-error", "-0.5", "--quiet")
    assert code == 2 and "average_error" in one_error_line(err)
