"""Tests of the channel exports for simulators and of ``load_channel``."""

from __future__ import annotations

import json
import re
import zipfile
from pathlib import Path

import numpy as np
import pytest
import stim
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from robusttomo.channels import Channel, amplitude_damping, depolarizing, pauli_channel, random_channel, rotation
from robusttomo.errors import DataError
from robusttomo.export import FORMATS, export_channel, export_reconstruction, load_channel
from robusttomo.plan import make_plan
from robusttomo.simulate import Device, error_from_parts, load_device, simulate

DOCS = Path(__file__).resolve().parents[1] / "docs" / "exports.md"
CZ = np.diag([1, 1, 1, -1]).astype(complex)


def _suffix(fmt: str) -> str:
    return ".npz" if fmt == "kraus-npz" else ".json"


def _complex(pairs) -> np.ndarray:
    a = np.array(pairs, dtype=float)
    return a[..., 0] + 1j * a[..., 1]


@pytest.fixture(scope="module")
def two_qubit_error() -> Channel:
    return error_from_parts(2, [{"type": "rotation", "pauli": "ZZ", "angle": 0.07},
                                {"type": "amplitude_damping", "gamma": 0.03, "qubits": [1]},
                                {"type": "depolarizing", "p": 0.99}])


# ---- round trips ----------------------------------------------------------------------------
@pytest.mark.parametrize("fmt", [f for f in FORMATS if f != "pauli"])
@pytest.mark.parametrize("n, seed", [(1, 0), (2, 1), (3, 2)])
def test_round_trip_exact_formats(fmt, n, seed, tmp_path):
    ch = random_channel(n, 0.15, np.random.default_rng(seed), rank=3)
    path = export_channel(ch, tmp_path / f"ch{_suffix(fmt)}", format=fmt, description="test")
    back = load_channel(path)
    assert back.n_qubits == n
    assert np.max(np.abs(back.ptm - ch.ptm)) < 1e-10


@pytest.mark.parametrize("n, seed", [(1, 3), (2, 4)])
def test_round_trip_pauli_gives_the_twirl(n, seed, tmp_path):
    ch = random_channel(n, 0.2, np.random.default_rng(seed))
    back = load_channel(export_channel(ch, tmp_path / "p.json", format="pauli"))
    # The Pauli twirl keeps the PTM diagonal and drops everything else (common practice).
    assert np.allclose(back.ptm, np.diag(np.diag(ch.ptm)), atol=1e-12)


# ---- conventions, checked with plain numpy on the raw files ----------------------------------
def test_kraus_json_matches_textbook_amplitude_damping(tmp_path):
    gamma = 0.2
    doc = json.loads(export_channel(amplitude_damping(gamma), tmp_path / "ad.json", format="kraus-json")
                     .read_text())
    ks = _complex(doc["kraus"])
    assert doc["format"] == "kraus" and doc["n_qubits"] == 1 and ks.shape[1:] == (2, 2)
    # Textbook Kraus pair K0 = [[1, 0], [0, sqrt(1-g)]], K1 = [[0, sqrt(g)], [0, 0]] (common practice).
    k0 = np.array([[1, 0], [0, np.sqrt(1 - gamma)]])
    k1 = np.array([[0, np.sqrt(gamma)], [0, 0]])
    rng = np.random.default_rng(0)
    a = rng.normal(size=(2, 2)) + 1j * rng.normal(size=(2, 2))
    rho = a @ a.conj().T
    rho /= np.trace(rho)
    want = k0 @ rho @ k0.T + k1 @ rho @ k1.T
    got = sum(k @ rho @ k.conj().T for k in ks)
    assert np.allclose(got, want, atol=1e-12)
    assert np.allclose(sum(k.conj().T @ k for k in ks), np.eye(2), atol=1e-12)


def test_kraus_npz_has_no_pickled_objects_and_matches_json(tmp_path, two_qubit_error):
    p_npz = export_channel(two_qubit_error, tmp_path / "e.npz", format="kraus-npz")
    p_json = export_channel(two_qubit_error, tmp_path / "e.json", format="kraus-json")
    with np.load(p_npz, allow_pickle=False) as z:  # raises if any member needs pickle
        ks = z["kraus"]
        assert ks.dtype == np.complex128 and ks.shape[1:] == (4, 4)
        assert str(z["kind"]) == "robusttomo-channel" and int(z["schema_version"]) == 1
        meta = json.loads(str(z["metadata"]))
    assert meta["conventions"]["qubit_order"].startswith("qubit 0 is the leftmost")
    assert np.allclose(ks, _complex(json.loads(p_json.read_text())["kraus"]), atol=1e-15)


def test_choi_convention_bell_state(tmp_path):
    # The trace-1 Choi matrix of the identity channel is the projector on (|00> + |11>)/sqrt(2),
    # input factor first (common practice).
    doc = json.loads(export_channel(Channel.from_ptm(np.eye(4)), tmp_path / "id.json", format="choi").read_text())
    j = _complex(doc["choi"])
    phi = np.array([1, 0, 0, 1]) / np.sqrt(2)
    assert np.allclose(j, np.outer(phi, phi), atol=1e-15)
    # Input factor first: for the channel rho -> |0><0| (reset), J = (I/2) (x) |0><0|.
    reset = Channel.from_kraus([np.array([[1, 0], [0, 0]]), np.array([[0, 1], [0, 0]])])
    j2 = _complex(json.loads(export_channel(reset, tmp_path / "reset.json", format="choi").read_text())["choi"])
    assert np.allclose(j2, np.kron(np.eye(2) / 2, np.diag([1.0, 0.0])), atol=1e-15)


def test_ptm_convention_z_rotation(tmp_path):
    theta = 0.3
    doc = json.loads(export_channel(rotation("Z", theta), tmp_path / "rz.json", format="ptm").read_text())
    assert doc["basis"] == ["I", "X", "Y", "Z"]
    c, s = np.cos(theta), np.sin(theta)
    # PTM of exp(-i theta Z / 2): X -> cos X + sin Y (common practice).
    want = np.array([[1, 0, 0, 0], [0, c, -s, 0], [0, s, c, 0], [0, 0, 0, 1]])
    assert np.allclose(np.array(doc["ptm"]), want, atol=1e-15)


def test_generator_file_rates(tmp_path):
    theta = 0.08
    ch = rotation("ZZ", theta) @ error_from_parts(2, [{"type": "dephasing", "prob": 0.01, "qubits": [0]}])
    doc = json.loads(export_channel(ch, tmp_path / "g.json", format="generator").read_text())
    # A rotation exp(-i theta/2 P) has Hamiltonian rate theta/2, and dephasing with probability q
    # has stochastic rate s with q = (1 - exp(-2 s))/2 ("A taxonomy of small Markovian errors",
    # PRX Quantum 3, 020335 (2022), rates as defined in robusttomo.generators).
    assert doc["hamiltonian"]["ZZ"] == pytest.approx(theta / 2, abs=1e-12)
    assert doc["stochastic"]["ZI"] == pytest.approx(-0.5 * np.log(1 - 2 * 0.01), abs=1e-12)
    assert doc["residual"] < 1e-12


def test_pauli_file_depolarizing_and_stim(tmp_path):
    p = 0.9
    doc = json.loads(export_channel(depolarizing(1, p), tmp_path / "dep.json", format="pauli").read_text())
    # Depolarizing with decay p: p_I = (1 + 3p)/4, p_X = p_Y = p_Z = (1 - p)/4 (common practice).
    assert doc["probabilities"]["I"] == pytest.approx((1 + 3 * p) / 4, abs=1e-14)
    for lab in "XYZ":
        assert doc["probabilities"][lab] == pytest.approx((1 - p) / 4, abs=1e-14)

    # Two qubits, fed to the stim stabilizer simulator: the 15 non-identity probabilities in file
    # order are PAULI_CHANNEL_2's arguments (IX, IY, IZ, XI, ..., first letter on the first target:
    # stim's gate documentation, from memory; checked here by sampling).
    probs = {"XI": 0.3, "IY": 0.1, "ZZ": 0.05}
    doc2 = json.loads(export_channel(pauli_channel(probs), tmp_path / "p2.json", format="pauli").read_text())
    labels = list(doc2["probabilities"])
    assert labels[0] == "II" and labels[1:4] == ["IX", "IY", "IZ"]
    args = [doc2["probabilities"][lab] for lab in labels[1:]]
    circ = stim.Circuit()
    circ.append("PAULI_CHANNEL_2", [0, 1], args)
    circ.append("M", [0, 1])
    shots = circ.compile_sampler(seed=5).sample(200_000).astype(float)
    flip0, flip1 = shots.mean(axis=0)
    assert flip0 == pytest.approx(0.3, abs=0.005)   # X on qubit 0 flips its Z readout
    assert flip1 == pytest.approx(0.1, abs=0.004)   # Y on qubit 1 flips it; ZZ flips nothing


# ---- the simulator accepts an exported channel ------------------------------------------------
@pytest.mark.parametrize("fmt", ["kraus-json", "kraus-npz", "choi", "ptm"])
def test_simulator_accepts_exported_channel(fmt, tmp_path, two_qubit_error):
    plan = make_plan(n_qubits=2, lengths=[1, 2, 3], sequences=4, shots=100, seed=3, interleave="cz")
    path = export_channel(two_qubit_error, tmp_path / f"e{_suffix(fmt)}", format=fmt)
    direct = simulate(plan, Device.build(2, error=depolarizing(2, 0.98), interleaved_error=two_qubit_error),
                      exact=True)
    via_file = simulate(plan, Device.build(2, error=depolarizing(2, 0.98), interleaved_error=load_channel(path)),
                        exact=True)
    assert np.allclose(via_file.counts, direct.counts, atol=1e-9)


def test_device_json_takes_exported_kraus_verbatim(tmp_path, two_qubit_error):
    doc = json.loads(export_channel(two_qubit_error, tmp_path / "e.json", format="kraus-json").read_text())
    dev_path = tmp_path / "device.json"
    dev_path.write_text(json.dumps({"schema_version": 1, "n_qubits": 2, "error_kraus": doc["kraus"],
                                    "readout": [[0.02, 0.03], [0.01, 0.02]], "prep_flip": [0.0, 0.01]}))
    dev = load_device(dev_path)
    assert dev.error.allclose(two_qubit_error, atol=1e-12)


# ---- export of an analysis result -------------------------------------------------------------
@pytest.fixture(scope="module")
def interleaved_rec():
    from test_report import make_reconstruction

    plan = make_plan(n_qubits=2, lengths=[1, 2, 3], sequences=[40, 40, 30], shots=100, seed=8, interleave="cz")
    err = error_from_parts(2, [{"type": "rotation", "pauli": "ZZ", "angle": 0.05}])
    counts = simulate(plan, Device.build(2, interleaved_error=err), seed=1)
    return make_reconstruction(plan=plan, counts=counts, error=err, target=CZ, label="cz", bootstrap=0)


def test_export_reconstruction_error_and_noisy_gate(interleaved_rec, tmp_path):
    rec = interleaved_rec
    p = export_reconstruction(rec, tmp_path / "err.json", format="kraus-json")
    doc = json.loads(p.read_text())
    assert doc["operation"] == "error" and doc["target"] == "cz"
    assert doc["source"]["plan_fingerprint"] == rec.plan_fingerprint
    assert np.allclose(_complex(doc["target_unitary"]), CZ)
    assert load_channel(p).allclose(rec.error_channel, atol=1e-10)
    q = export_reconstruction(rec, tmp_path / "gate.json", format="ptm", operation="noisy-gate")
    assert load_channel(q).allclose(rec.noisy_gate, atol=1e-12)
    with pytest.raises(ValueError, match="describes the error after the ideal gate"):
        export_reconstruction(rec, tmp_path / "x.json", format="pauli", operation="noisy-gate")
    with pytest.raises(ValueError, match="'operation' must be one of"):
        export_reconstruction(rec, tmp_path / "x.json", format="ptm", operation="gate")


# ---- refusals -----------------------------------------------------------------------------------
def test_no_overwrite_without_force(tmp_path):
    p = tmp_path / "c.json"
    p.write_text("keep me")
    with pytest.raises(FileExistsError, match="output exists"):
        export_channel(depolarizing(1, 0.9), p, format="ptm")
    assert p.read_text() == "keep me"
    export_channel(depolarizing(1, 0.9), p, format="ptm", force=True)
    assert load_channel(p).allclose(depolarizing(1, 0.9))


def test_bad_arguments(tmp_path):
    with pytest.raises(ValueError, match="'format' must be one of"):
        export_channel(depolarizing(1, 0.9), tmp_path / "x.json", format="qasm")
    with pytest.raises(TypeError, match="'channel' must be a robusttomo Channel"):
        export_channel(np.eye(4), tmp_path / "x.json", format="ptm")
    # PTM diag(1, 1, -1, 1) is the transpose map, positive but not completely positive (common practice)
    not_cp = Channel.from_ptm(np.diag([1.0, 1.0, -1.0, 1.0]))
    with pytest.raises(ValueError, match="not completely positive"):
        export_channel(not_cp, tmp_path / "x.json", format="kraus-json")
    with pytest.raises(ValueError, match="negative Pauli probability"):
        export_channel(not_cp, tmp_path / "x.json", format="pauli")
    assert not (tmp_path / "x.json").exists()


def _good_doc(tmp_path) -> dict:
    return json.loads(export_channel(amplitude_damping(0.1), tmp_path / "good.json", format="kraus-json")
                      .read_text())


@pytest.mark.parametrize("mutate, match", [
    (lambda d: d.pop("schema_version"), "field 'schema_version'"),
    (lambda d: d.update(schema_version=7), "schema_version 7"),
    (lambda d: d.update(kind="robusttomo-device"), "field 'kind'"),
    (lambda d: d.update(n_qubits=4), "field 'n_qubits'"),
    (lambda d: d.update(format="superop"), "field 'format'"),
    (lambda d: d.update(kraus=[[[1, 0], [0, 1]]]), "field 'kraus'"),
    (lambda d: d["kraus"][0][0].__setitem__(0, [float("nan"), 0.0]), "field 'kraus'"),
    (lambda d: d["kraus"][0][0].__setitem__(0, [2.0, 0.0]), "not trace preserving"),
    (lambda d: d["kraus"][0][0].__setitem__(0, ["1", 0.0]), "finite numbers"),
])
def test_load_rejects_bad_kraus_files(tmp_path, mutate, match):
    doc = _good_doc(tmp_path)
    mutate(doc)
    p = tmp_path / "bad.json"
    p.write_text(json.dumps(doc))
    with pytest.raises(DataError, match=re.escape(match)) as info:
        load_channel(p)
    assert str(info.value).startswith(f"{p}:")


def test_load_rejects_bad_other_formats(tmp_path):
    base = {"schema_version": 1, "kind": "robusttomo-channel", "n_qubits": 1}
    cases = [
        ({"format": "ptm", "ptm": [[1, 0.1, 0, 0], [0, 1, 0, 0], [0, 0, 1, 0], [0, 0, 0, 1]]}, "not trace preserving"),
        ({"format": "ptm", "ptm": [[1, 0], [0, 1]]}, "field 'ptm'"),
        ({"format": "choi", "choi": (np.eye(4) / 4).tolist()}, "field 'choi'"),
        # the transpose map: Choi matrix SWAP/2, trace preserving but not CP (common practice)
        ({"format": "choi", "choi": np.stack([np.eye(4)[[0, 2, 1, 3]] / 2, np.zeros((4, 4))], -1).tolist()},
         "not completely positive"),
        ({"format": "pauli", "probabilities": {"I": 0.5, "X": 0.6}}, "sum to 1"),
        ({"format": "pauli", "probabilities": {"I": 1.2, "X": -0.2}}, "non-negative"),
        ({"format": "pauli", "probabilities": {"II": 1.0}}, "unknown Pauli label"),
        ({"format": "generator", "generator": [[0.1, 0, 0, 0], [0, 0, 0, 0], [0, 0, 0, 0], [0, 0, 0, 0]]}, "row 0"),
    ]
    for extra, match in cases:
        p = tmp_path / "bad.json"
        p.write_text(json.dumps({**base, **extra}))
        with pytest.raises(DataError, match=re.escape(match)) as info:
            load_channel(p)
        assert str(p) in str(info.value)


def test_load_rejects_unreadable_files(tmp_path):
    with pytest.raises(DataError, match="no such channel file"):
        load_channel(tmp_path / "missing.json")
    p = tmp_path / "x.json"
    p.write_text("{not json")
    with pytest.raises(DataError, match="not valid JSON"):
        load_channel(p)
    p.write_bytes(b"\xff\xfe\x00")
    with pytest.raises(DataError, match="not UTF-8"):
        load_channel(p)
    p.write_text("[1, 2]")
    with pytest.raises(DataError, match="top level must be a JSON object"):
        load_channel(p)
    z = tmp_path / "x.npz"
    np.savez(z, kraus=np.eye(2)[None])
    with pytest.raises(DataError, match="missing from the archive"):
        load_channel(z)
    obj = tmp_path / "obj.npz"
    np.savez(obj, kraus=np.array([object()], dtype=object), schema_version=1, kind="robusttomo-channel",
             format="kraus", n_qubits=1)
    with pytest.raises(DataError):  # an object array would need pickle: refused
        load_channel(obj)


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(data=st.data())
def test_load_channel_never_crashes_on_mutated_files(tmp_path, data):
    # Property test: random byte mutations of valid files either load or raise DataError.
    fmt = data.draw(st.sampled_from(list(FORMATS)))
    src = tmp_path / f"src-{fmt}{_suffix(fmt)}"
    if not src.exists():
        export_channel(amplitude_damping(0.1) @ rotation("X", 0.2), src, format=fmt)
    raw = bytearray(src.read_bytes())
    for _ in range(data.draw(st.integers(1, 4))):
        pos = data.draw(st.integers(0, len(raw) - 1))
        raw[pos] = data.draw(st.integers(0, 255))
    if data.draw(st.booleans()):
        raw = raw[: data.draw(st.integers(0, len(raw)))]
    bad = tmp_path / f"mut{_suffix(fmt)}"
    bad.write_bytes(bytes(raw))
    try:
        ch = load_channel(bad)
    except DataError:
        return
    assert isinstance(ch, Channel) and ch.is_tp(atol=1e-5)


def test_npz_is_a_plain_zip_of_npy_members(tmp_path):
    p = export_channel(depolarizing(1, 0.9), tmp_path / "d.npz", format="kraus-npz")
    with zipfile.ZipFile(p) as z:
        assert sorted(z.namelist()) == sorted(f"{k}.npy" for k in ("kraus", "schema_version", "kind", "format",
                                                                   "n_qubits", "metadata"))


# ---- the documentation example runs -------------------------------------------------------------
def _python_blocks(text: str) -> list[str]:
    return re.findall(r"```python\n(.*?)```", text, re.S)


def test_docs_density_matrix_example_runs(tmp_path, monkeypatch, two_qubit_error):
    blocks = _python_blocks(DOCS.read_text(encoding="utf-8"))
    assert blocks, "docs/exports.md has no python example"
    export_channel(two_qubit_error, tmp_path / "cz-error.json", format="kraus-json")
    export_channel(two_qubit_error, tmp_path / "cz-error-pauli.json", format="pauli")
    monkeypatch.chdir(tmp_path)
    ns: dict = {}
    for code in blocks:
        exec(compile(code, str(DOCS), "exec"), ns)  # noqa: S102 - our own documentation
    # The example's plain-numpy density-matrix simulation agrees with the package's channel algebra.
    assert ns["fidelity"] == pytest.approx(ns["fidelity_check"], abs=1e-12)
    assert 0.9 < ns["fidelity"] < 1.0
