"""Tests of the synthetic device, its JSON file and the density-matrix simulator."""

from __future__ import annotations

import itertools
import json
import math

import numpy as np
import pytest
import scipy.linalg
import stim
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from robusttomo import channels, clifford
from robusttomo.channels import Channel
from robusttomo.errors import DataError
from robusttomo.plan import InterleavedGate, Plan, SequenceBlock, SequenceKind, make_plan
from robusttomo.simulate import Device, error_from_parts, load_device, save_device, simulate

# Plain textbook matrices, written out here so the references do not go through the package.
I2 = np.eye(2, dtype=complex)
X = np.array([[0, 1], [1, 0]], dtype=complex)
Y = np.array([[0, -1j], [1j, 0]], dtype=complex)
Z = np.array([[1, 0], [0, -1]], dtype=complex)
CZ = np.diag([1, 1, 1, -1]).astype(complex)


def kron(*ms: np.ndarray) -> np.ndarray:
    out = np.ones((1, 1), dtype=complex)
    for m in ms:
        out = np.kron(out, m)
    return out


def make_block_plan(n, blocks, *, shots=100, seed=0, interleave=None):
    """Plan built directly from lists of Clifford-index rows, one SequenceBlock per entry."""
    out, first = [], 0
    for kind, rows in blocks:
        rows = np.asarray(rows, dtype=np.int64)
        out.append(SequenceBlock(kind=kind, length=rows.shape[1], cliffords=rows, first_id=first))
        first += rows.shape[0]
    return Plan(n_qubits=n, shots=shots, seed=seed, blocks=tuple(out), interleave=interleave)


def random_rows(n, k, m, rng):
    return clifford.random_clifford_indices(n, k * m, rng).reshape(k, m)


def find_clifford(n, target):
    """Index of the Clifford equal to ``target`` up to a global phase."""
    candidates = np.arange(min(clifford.clifford_group_order(n), 12000))  # the first indices suffice here
    us = clifford.clifford_unitaries(n, candidates)
    overlap = np.abs(np.einsum("kab,ab->k", us.conj(), target)) / target.shape[0]
    assert overlap.max() > 1 - 1e-9, "target not among the searched Cliffords"
    return int(np.argmax(overlap > 1 - 1e-9))


def embed_full(u_small, qubits, n):
    """Full 2**n matrix of a gate acting on ``qubits`` (its own order), by explicit index algebra."""
    k = len(qubits)
    d = 2**n
    out = np.zeros((d, d), dtype=complex)
    for col in range(d):
        bits = [(col >> (n - 1 - q)) & 1 for q in range(n)]
        sub_in = sum(bits[q] << (k - 1 - i) for i, q in enumerate(qubits))
        for sub_out in range(2**k):
            amp = u_small[sub_out, sub_in]
            if amp == 0:
                continue
            new = list(bits)
            for i, q in enumerate(qubits):
                new[q] = (sub_out >> (k - 1 - i)) & 1
            row = sum(new[q] << (n - 1 - q) for q in range(n))
            out[row, col] += amp
    return out


def apply_kraus(ks, rho):
    return sum(k @ rho @ k.conj().T for k in ks)


# ---- Device construction -------------------------------------------------------------------
def test_readout_pairs_define_tensor_product_confusion():
    # Independent per-qubit readout flips give P(y | x) = prod_q P(y_q | x_q) (common practice).
    pairs = [(0.02, 0.05), (0.1, 0.03)]
    dev = Device.build(2, readout=pairs)
    for x, y in itertools.product(range(4), repeat=2):
        expected = 1.0
        for q, (p1g0, p0g1) in enumerate(pairs):
            xb, yb = (x >> (1 - q)) & 1, (y >> (1 - q)) & 1
            flip = p1g0 if xb == 0 else p0g1
            expected *= flip if xb != yb else 1 - flip
        assert dev.readout[y, x] == pytest.approx(expected, abs=1e-15)


@pytest.mark.parametrize("n", [1, 2, 3])
def test_prep_flips_and_readout_give_binomial_probabilities(n):
    # With the identity Clifford, qubit q reads 1 with probability f(1 - b) + (1 - f) a and the
    # qubits are independent: the outcome law is a product of Bernoulli laws (common practice).
    rng = np.random.default_rng(n)
    flips = rng.uniform(0, 0.1, n).tolist()
    pairs = [tuple(v) for v in rng.uniform(0, 0.1, (n, 2)).tolist()]
    dev = Device.build(n, prep_flip=flips, readout=pairs)
    ident = find_clifford(n, np.eye(2**n))
    plan = make_block_plan(n, [(SequenceKind.REFERENCE, [[ident, ident]])], shots=1000)
    got = simulate(plan, dev, exact=True).counts[0] / 1000
    p_one = [f * (1 - b) + (1 - f) * a for f, (a, b) in zip(flips, pairs)]
    for y in range(2**n):
        bits = [(y >> (n - 1 - q)) & 1 for q in range(n)]
        expected = math.prod(p if b else 1 - p for p, b in zip(p_one, bits))
        assert got[y] == pytest.approx(expected, abs=1e-12)


def test_readout_of_flipped_qubit_and_sample_frequencies():
    # An X on qubit 0 makes qubit 0 read 0 with probability P(read 0 | 1) (common practice);
    # sampled frequencies over many sequences lie within 5 binomial standard deviations.
    pairs = [(0.03, 0.08), (0.05, 0.02)]
    dev = Device.build(2, readout=pairs)
    xi = find_clifford(2, kron(X, I2))
    plan = make_block_plan(2, [(SequenceKind.REFERENCE, [[xi]] * 400)], shots=500)
    counts = simulate(plan, dev, seed=11)
    freq = counts.counts.sum(axis=0) / counts.counts.sum()
    expected = np.array([0.08 * 0.95, 0.08 * 0.05, 0.92 * 0.95, 0.92 * 0.05])  # outcomes 00, 01, 10, 11
    sigma = np.sqrt(expected * (1 - expected) / counts.counts.sum())
    assert np.all(np.abs(freq - expected) < 5 * sigma)
    exact = simulate(plan, dev, exact=True).counts[0] / 500
    assert np.allclose(exact, expected, atol=1e-14)


@pytest.mark.parametrize(
    ("kwargs", "exc", "match"),
    [
        ({"error": channels.identity(1)}, ValueError, "'error' must act on 2 qubit"),
        ({"error": Channel.from_ptm(np.diag([1.0, 1.5, 1, 1, 1, 1, 1, 1, 1, 1, 1, 1, 1, 1, 1, 1]))},
         ValueError, "'error' is not completely positive"),
        ({"error": Channel.from_ptm(np.eye(16) * 0.5)}, ValueError, "'error' is not trace preserving"),
        ({"error": "depolarizing"}, TypeError, "'error' must be a robusttomo Channel"),
        ({"gate_errors": {"rx": channels.identity(1)}}, ValueError, "'gate_errors' key must be a native gate"),
        ({"gate_errors": {"cx": channels.identity(1)}}, ValueError, r"'gate_errors\['cx'\]' must act on 2 qubit"),
        ({"gate_errors": {"h": channels.identity(2)}}, ValueError, r"'gate_errors\['h'\]' must act on 1 qubit"),
        ({"interleaved_error": channels.identity(3)}, ValueError, "'interleaved_error' must act on 2"),
        ({"prep": np.eye(4) / 2}, ValueError, "'prep' must have trace 1"),
        ({"prep": np.diag([1.2, -0.2, 0, 0])}, ValueError, "'prep' must be positive semidefinite"),
        ({"prep": np.eye(2)}, ValueError, "'prep' must be a 4 x 4 density matrix"),
        ({"prep": np.triu(np.ones((4, 4))) / 4}, ValueError, "'prep' must be Hermitian"),
        ({"confusion": np.eye(4) + np.outer([0.5, -0.5, 0, 0], [1, 0, 0, 0])}, ValueError, "'readout' entries are probabilities"),
        ({"confusion": np.eye(4) * 0.5}, ValueError, "'readout' columns must sum to 1"),
        ({"prep_flip": [0.1]}, ValueError, "'prep_flip' needs one probability per qubit"),
        ({"prep_flip": [0.1, 1.5]}, ValueError, r"'prep_flip' entries are probabilities"),
        ({"readout": [(0.1, 0.1)]}, ValueError, "'readout' needs one pair"),
        ({"readout": [(0.1, -0.1), (0, 0)]}, ValueError, "'readout' entries are probabilities"),
        ({"prep_flip": [0, 0], "prep": np.diag([1.0, 0, 0, 0])}, ValueError, "either 'prep_flip' or 'prep'"),
        ({"readout": [(0, 0), (0, 0)], "confusion": np.eye(4)}, ValueError, "either 'readout'"),
    ],
)
def test_device_rejects_bad_input(kwargs, exc, match):
    with pytest.raises(exc, match=match):
        Device.build(2, **kwargs)


def test_device_is_immutable_and_copies_input():
    conf = np.eye(2)
    dev = Device.build(1, confusion=conf, gate_errors={"h": channels.depolarizing(1, 0.9)})
    conf[0, 0] = 0.5  # must not leak into the device
    assert dev.readout[0, 0] == 1.0
    with pytest.raises(ValueError):
        dev.readout[0, 0] = 0.3
    with pytest.raises(TypeError):
        dev.gate_errors["x"] = channels.identity(1)  # type: ignore[index]
    with pytest.raises(AttributeError):
        dev.error = channels.identity(1)  # type: ignore[misc]


# ---- named error parts ---------------------------------------------------------------------
def test_error_from_parts_matches_textbook_channels():
    theta = 0.05
    ch = error_from_parts(2, [{"type": "rotation", "pauli": "ZZ", "angle": theta}])
    u = scipy.linalg.expm(-0.5j * theta * kron(Z, Z))  # ZZ coupling exp(-i theta/2 ZZ)
    assert ch.allclose(Channel.from_unitary(u), atol=1e-12)
    ch = error_from_parts(2, [{"type": "rotation", "pauli": "X", "angle": 0.2, "qubits": [1]}])
    assert ch.allclose(Channel.from_unitary(kron(I2, scipy.linalg.expm(-0.1j * X))), atol=1e-12)
    # Amplitude damping Kraus operators (common practice): K0 = diag(1, sqrt(1-g)), K1 = sqrt(g)|0><1|.
    g = 0.02
    k0 = np.array([[1, 0], [0, np.sqrt(1 - g)]])
    k1 = np.array([[0, np.sqrt(g)], [0, 0]])
    ch = error_from_parts(2, [{"type": "amplitude_damping", "gamma": g, "qubits": [0]}])
    assert ch.allclose(Channel.from_kraus([kron(k0, I2), kron(k1, I2)]), atol=1e-12)
    # Dephasing rho -> (1-p) rho + p Z rho Z on qubit 1.
    ch = error_from_parts(2, [{"type": "dephasing", "prob": 0.01, "qubits": [1]}])
    assert ch.allclose(Channel.from_kraus([np.sqrt(0.99) * np.eye(4), np.sqrt(0.01) * kron(I2, Z)]), atol=1e-12)
    # Joint depolarizing L(rho) = p rho + (1 - p) tr(rho) I/d.
    ch = error_from_parts(2, [{"type": "depolarizing", "p": 0.9, "qubits": [0, 1]}])
    rho = np.diag([0.7, 0.1, 0.15, 0.05]).astype(complex)
    assert np.allclose(ch.apply(rho), 0.9 * rho + 0.1 * np.eye(4) / 4, atol=1e-12)


def test_error_from_parts_composes_in_list_order():
    a = {"type": "amplitude_damping", "gamma": 0.3}
    b = {"type": "rotation", "pauli": "X", "angle": 0.7}
    ab = error_from_parts(1, [a, b])
    assert ab.allclose(error_from_parts(1, [b]) @ error_from_parts(1, [a]), atol=1e-13)
    assert not ab.allclose(error_from_parts(1, [b, a]), atol=1e-6)
    assert error_from_parts(3, []).allclose(channels.identity(3))


@pytest.mark.parametrize(
    ("parts", "match"),
    [
        ([{"type": "twirl"}], r"parts\[0\]: 'type' must be one of"),
        ([{"type": "rotation", "pauli": "ZZ"}], r"parts\[0\]: a rotation part needs field 'angle'"),
        ([{"type": "rotation", "pauli": "Z", "angle": 0.1}], r"'pauli' 'Z' needs one letter per qubit"),
        ([{"type": "rotation", "pauli": "ZQ", "angle": 0.1}], r"'pauli' must be a label over 'IXYZ'"),
        ([{"type": "rotation", "pauli": "ZZ", "angle": float("nan")}], r"'angle' must be a finite number"),
        ([{"type": "dephasing", "prob": 1.5}], r"'prob' must lie in \[0, 1\]"),
        ([{"type": "amplitude_damping", "gamma": 0.1, "qubits": [2]}], r"'qubits' must be distinct indices in 0..1"),
        ([{"type": "depolarizing", "p": 0.9, "qubits": [0, 0]}], r"'qubits' must be distinct"),
        ([{"type": "depolarizing", "p": -0.5}], r"'p' must lie in \[-1/15, 1\]"),
        ([{}, {"type": "depolarizing", "p": 0.5, "extra": 1}], r"parts\[0\]: 'type' must be one of"),
        ([{"type": "depolarizing", "p": 0.5, "extra": 1}], r"unknown field 'extra'"),
        ([{"type": "dephasing", "prob": True}], r"'prob' must be a finite number"),
    ],
)
def test_error_from_parts_rejects_bad_parts(parts, match):
    with pytest.raises(ValueError, match=match):
        error_from_parts(2, parts)


def test_error_from_parts_rejects_non_list():
    with pytest.raises(TypeError, match="'parts' must be a list"):
        error_from_parts(1, {"type": "dephasing", "prob": 0.1})  # type: ignore[arg-type]


# ---- device JSON ---------------------------------------------------------------------------
def _pairs(m):
    return [[[float(z.real), float(z.imag)] for z in row] for row in np.asarray(m, dtype=complex)]


def test_load_device_minimal_schema(tmp_path):
    g = 0.04
    k0 = kron(np.array([[1, 0], [0, np.sqrt(1 - g)]]), I2)
    k1 = kron(np.array([[0, np.sqrt(g)], [0, 0]]), I2)
    doc = {"schema_version": 1, "n_qubits": 2, "error_kraus": [_pairs(k0), _pairs(k1)],
           "readout": [[0.02, 0.05], [0.01, 0.03]], "prep_flip": [0.01, 0.02]}
    path = tmp_path / "dev.json"
    path.write_text(json.dumps(doc))
    dev = load_device(path)
    assert dev.error.allclose(Channel.from_kraus([k0, k1]), atol=1e-12)
    assert dev.readout[1, 0] == pytest.approx(0.98 * 0.01)  # |00> read as 01: qubit 1 flips 0 -> 1
    assert dev.prep[3, 3].real == pytest.approx(0.01 * 0.02)
    assert dev.gate_errors == {} and dev.interleaved_error is None


def test_device_json_round_trip_with_every_key(tmp_path):
    rng = np.random.default_rng(3)
    dev = Device.build(
        2,
        error=channels.random_channel(2, 0.1, rng),
        gate_errors={"cx": channels.random_channel(2, 0.05, rng), "h": channels.amplitude_damping(0.01)},
        interleaved_error=channels.random_channel(2, 0.07, rng),
        prep=np.diag([0.9, 0.05, 0.03, 0.02]),
        confusion=np.array([[0.9, 0.1, 0, 0], [0.05, 0.85, 0.1, 0], [0.05, 0.05, 0.8, 0.1], [0, 0, 0.1, 0.9]]),
    )
    path = tmp_path / "dev.json"
    save_device(dev, path)
    back = load_device(path)
    assert back.error.allclose(dev.error, atol=1e-10)
    assert back.interleaved_error.allclose(dev.interleaved_error, atol=1e-10)
    assert set(back.gate_errors) == {"cx", "h"}
    assert all(back.gate_errors[g].allclose(dev.gate_errors[g], atol=1e-10) for g in dev.gate_errors)
    assert np.array_equal(back.readout, dev.readout) and np.allclose(back.prep, dev.prep, atol=1e-15)
    with pytest.raises(FileExistsError):
        save_device(dev, path)
    save_device(Device.build(2), path, force=True)
    assert load_device(path).error.allclose(channels.identity(2), atol=1e-12)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["dev.json"]  # no temporary left behind


def test_load_device_parts_and_gate_errors(tmp_path):
    doc = {"schema_version": 1, "n_qubits": 2,
           "error_parts": [{"type": "rotation", "pauli": "ZZ", "angle": 0.05},
                           {"type": "depolarizing", "p": 0.99, "qubits": [0, 1]}],
           "gate_errors": {"cx": {"parts": [{"type": "depolarizing", "p": 0.95}]},
                           "h": {"kraus": [_pairs(np.sqrt(0.9) * I2), _pairs(np.sqrt(0.1) * Z)]}},
           "interleaved_error_parts": [{"type": "amplitude_damping", "gamma": 0.02, "qubits": [0]}],
           "confusion": np.eye(4).tolist(), "prep_density": _pairs(np.diag([1.0, 0, 0, 0]))}
    path = tmp_path / "dev.json"
    path.write_text(json.dumps(doc))
    dev = load_device(path)
    assert dev.error.allclose(error_from_parts(2, doc["error_parts"]), atol=1e-13)
    assert dev.gate_errors["cx"].allclose(channels.depolarizing(2, 0.95), atol=1e-13)
    assert dev.gate_errors["h"].allclose(channels.dephasing(0.1), atol=1e-13)
    assert dev.interleaved_error.allclose(error_from_parts(2, doc["interleaved_error_parts"]), atol=1e-13)


_GOOD = {"schema_version": 1, "n_qubits": 1}


@pytest.mark.parametrize(
    ("change", "match"),
    [
        ({"schema_version": 2}, "schema_version 2"),
        ({"schema_version": "1"}, "field 'schema_version' is missing or not an integer"),
        ({"n_qubits": 4}, "field 'n_qubits' must be 1, 2 or 3"),
        ({"colour": "red"}, "unknown field 'colour'"),
        ({"kind": "robusttomo-plan"}, "field 'kind' must be 'robusttomo-device'"),
        ({"error_kraus": [[[[1, 0], [0, 0]], [[0, 0], [0.5, 0]]]]}, "field 'error_kraus': Kraus operators are not trace preserving"),
        ({"error_kraus": [[[1, 0], [0, 1]]]}, "field 'error_kraus': expected a nested list of shape"),
        ({"error_kraus": []}, "field 'error_kraus': must be a non-empty list"),
        ({"error_kraus": [[[[1, 0], [0, 0]], [[0, 0], ["1", 0]]]]}, "field 'error_kraus': entries must be finite numbers"),
        ({"error_parts": [{"type": "dephasing", "prob": 2}]}, r"field 'error_parts': parts\[0\]: 'prob' must lie"),
        ({"error_parts": {"type": "dephasing"}}, "field 'error_parts': must be a list"),
        ({"error_parts": [], "error_kraus": [_pairs(I2)]}, "give either field 'error_kraus' or field 'error_parts'"),
        ({"readout": [[0.1, 1.2]]}, r"field 'readout': entries are probabilities in \[0, 1\]"),
        ({"readout": [[0.1, 0.2], [0.1, 0.2]]}, "field 'readout': expected a nested list of shape"),
        ({"readout": [[0.1, 0.2]], "confusion": [[1, 0], [0, 1]]}, "give either field 'readout'"),
        ({"confusion": [[0.9, 0.2], [0.2, 0.8]]}, "'confusion' columns must sum to 1"),
        ({"prep_flip": [0.1, 0.1]}, "field 'prep_flip': expected a nested list of shape"),
        ({"prep_flip": [-0.1]}, r"field 'prep_flip': entries are probabilities in \[0, 1\]"),
        ({"prep_density": _pairs(np.diag([1.0, 1.0]))}, "'prep_density' must have trace 1"),
        ({"gate_errors": {"rz": {"parts": []}}}, "field 'gate_errors': unknown native gate 'rz'"),
        ({"gate_errors": {"h": []}}, "field 'gate_errors.h': must be an object with 'kraus' or 'parts'"),
        ({"gate_errors": {"cx": {"kraus": [_pairs(I2)]}}}, "field 'gate_errors.cx.kraus': expected a nested list of shape"),
        ({"interleaved_error_kraus": [_pairs(2 * I2)]}, "field 'interleaved_error_kraus': Kraus operators are not trace"),
    ],
)
def test_load_device_rejects_bad_fields(tmp_path, change, match):
    path = tmp_path / "dev.json"
    path.write_text(json.dumps({**_GOOD, **change}))
    with pytest.raises(DataError, match=match) as info:
        load_device(path)
    assert str(path) in str(info.value) and "\n" not in str(info.value)


@pytest.mark.parametrize(
    ("text", "match"),
    [("{", "not valid JSON"), ("[1, 2]", "top level must be a JSON object"), ('{"n_qubits": 1}', "schema_version"),
     ('{"schema_version": 1, "n_qubits": 1, "prep_flip": [NaN]}', "entries must be finite numbers")],
)
def test_load_device_rejects_bad_text(tmp_path, text, match):
    path = tmp_path / "dev.json"
    path.write_text(text)
    with pytest.raises(DataError, match=match):
        load_device(path)


def test_load_device_missing_file(tmp_path):
    with pytest.raises(DataError, match="no such device file"):
        load_device(tmp_path / "nope.json")


_json_leaf = st.one_of(st.none(), st.booleans(), st.integers(-3, 5), st.floats(allow_nan=True),
                       st.text(max_size=4))
_json_values = st.recursive(_json_leaf, lambda kids: st.lists(kids, max_size=4) | st.dictionaries(
    st.sampled_from(["type", "p", "kraus", "parts", "h", "cx", "qubits", "angle", "pauli"]), kids, max_size=3),
    max_leaves=20)


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(doc=st.dictionaries(st.sampled_from(sorted(["schema_version", "n_qubits", "error_kraus", "error_parts",
                                                   "gate_errors", "readout", "prep_flip", "confusion",
                                                   "prep_density", "interleaved_error_kraus", "kind"])),
                           _json_values, max_size=6),
       base=st.booleans())
def test_load_device_never_crashes_on_random_documents(tmp_path, doc, base):
    if base:
        doc = {"schema_version": 1, "n_qubits": 1, **doc}
    path = tmp_path / "fuzz.json"
    path.write_text(json.dumps(doc))
    try:
        dev = load_device(path)
    except DataError as err:
        assert str(path) in str(err)
    else:
        assert isinstance(dev, Device)


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(data=st.data())
def test_load_device_never_crashes_on_mutated_files(tmp_path, data):
    good = json.dumps({"schema_version": 1, "n_qubits": 1, "error_kraus": [_pairs(I2)],
                       "readout": [[0.02, 0.05]], "prep_flip": [0.01]}).encode()
    raw = bytearray(good)
    for _ in range(data.draw(st.integers(1, 4))):
        pos = data.draw(st.integers(0, len(raw) - 1))
        op = data.draw(st.sampled_from(["set", "delete", "insert"]))
        byte = data.draw(st.integers(0, 255))
        if op == "set":
            raw[pos] = byte
        elif op == "delete":
            del raw[pos]
        else:
            raw.insert(pos, byte)
    path = tmp_path / "mut.json"
    path.write_bytes(bytes(raw))
    try:
        load_device(path)
    except DataError:
        pass


# ---- simulation against external references ------------------------------------------------
def test_matches_direct_state_vector_with_unitary_error():
    # A coherent error keeps the state pure, so a plain state-vector product is an exact
    # reference: psi_m = E U_m ... E U_1 |00>, then p = C |psi|^2.
    rng = np.random.default_rng(5)
    rows = random_rows(2, 20, 6, rng)
    e = scipy.linalg.expm(-0.5j * (0.3 * kron(Z, Z) + 0.2 * kron(I2, X) + 0.1 * kron(Y, I2)))
    e_int = scipy.linalg.expm(-0.5j * 0.25 * kron(X, X))
    dev = Device.build(2, error=Channel.from_unitary(e), interleaved_error=Channel.from_unitary(e_int),
                       readout=[(0.02, 0.04), (0.03, 0.01)])
    plan = make_block_plan(2, [(SequenceKind.REFERENCE, rows), (SequenceKind.INTERLEAVED, rows)],
                           interleave=InterleavedGate(label="cz", unitary=CZ))
    got = simulate(plan, dev, exact=True).counts / plan.shots
    for b, interleaved in enumerate([False, True]):
        for k, row in enumerate(rows):
            psi = np.zeros(4, dtype=complex)
            psi[0] = 1
            for u in clifford.clifford_unitaries(2, row):
                psi = e @ (u @ psi)
                if interleaved:
                    psi = e_int @ (CZ @ psi)
            expected = dev.readout @ np.abs(psi) ** 2
            assert np.allclose(got[b * len(rows) + k], expected, atol=1e-12)


_STIM_NAMES = {"h": "H", "s": "S", "sdg": "S_DAG", "x": "X", "y": "Y", "z": "Z", "cx": "CX", "cz": "CZ"}


@pytest.mark.parametrize("n", [1, 2, 3])
def test_noise_free_clifford_sequences_match_stim(n):
    # stim (general-purpose stabilizer-circuit simulator, PyPI) runs the compiled circuits; its
    # state vector with endian="big" puts qubit 0 first, our outcome order.
    rng = np.random.default_rng(10 + n)
    rows = random_rows(n, 12, 4, rng)
    plan = make_block_plan(n, [(SequenceKind.REFERENCE, rows)])
    got = simulate(plan, Device.build(n), exact=True).counts / plan.shots
    for k, row in enumerate(rows):
        sim = stim.TableauSimulator()
        sim.set_num_qubits(n)
        for circuit in clifford.clifford_circuits(n, row):
            for name, qubits in circuit:
                sim.do(stim.Circuit(f"{_STIM_NAMES[name]} {' '.join(map(str, qubits))}"))
        probs = np.abs(sim.state_vector(endian="big")) ** 2
        assert np.allclose(got[k], probs, atol=1e-12)


@pytest.mark.parametrize("p", [0.9, 0.97])
def test_depolarizing_identity_probe_decays_as_p_to_the_m(p):
    # Filtered estimator of THEORY.md for the identity probe, F(x; C) = kappa (|<x|U|0>|^2 - 1/d),
    # kappa = d (d+1)/(d-1); its mean over all sequences is c p^(m-1) with c = p for depolarizing
    # L and perfect SPAM, i.e. p^m ("A general framework for randomized benchmarking",
    # PRX Quantum 3, 020357 (2022); decay law as in "Scalable and robust randomized
    # benchmarking of quantum processes", PRL 106, 180504 (2011)).
    d, kappa = 2, 2 * 3 / 1
    dev = Device.build(1, error=channels.depolarizing(1, p))
    blocks = []
    for m in (1, 2, 3):
        rows = np.array(list(itertools.product(range(24), repeat=m)), dtype=np.int64)
        blocks.append((SequenceKind.REFERENCE, rows))
    plan = make_block_plan(1, blocks, shots=1000)
    counts = simulate(plan, dev, exact=True)
    for b, (m, (_, rows)) in enumerate(zip((1, 2, 3), blocks)):
        probs = counts.for_block(plan, b) / plan.shots
        us = clifford.clifford_unitaries(1, rows.reshape(-1)).reshape(rows.shape[0], m, 2, 2)
        total = np.broadcast_to(np.eye(2, dtype=complex), (rows.shape[0], 2, 2))
        for t in range(m):
            total = us[:, t] @ total
        ideal = np.abs(total[:, :, 0]) ** 2  # |<x|U|0>|^2
        f_m = np.mean(np.sum(probs * kappa * (ideal - 1 / d), axis=1))
        assert f_m == pytest.approx(p**m, abs=1e-12)


def test_filtered_decay_with_spam_and_nonunital_error():
    # Same identity with faulty SPAM and a non-unital, coherent error: f(m) = c lambda**(m-1) with
    # lambda = (tr R_L - 1)/(d*d - 1) and c = d/(d-1)**2 [sum_x tr(E_x L(|x><x|)) - 1] [<0|rho|0> - 1/d]
    # ("A general framework for randomized benchmarking", PRX Quantum 3, 020357 (2022); closed
    # form of c as in THEORY.md). All 24**m one-qubit sequences, exact probabilities.
    d, kappa = 2, 6.0
    err = channels.amplitude_damping(0.05) @ channels.rotation("X", 0.2) @ channels.depolarizing(1, 0.97)
    dev = Device.build(1, error=err, prep_flip=[0.03], readout=[(0.02, 0.05)])
    blocks = [(SequenceKind.REFERENCE, np.array(list(itertools.product(range(24), repeat=m)), dtype=np.int64))
              for m in (1, 2, 3)]
    plan = make_block_plan(1, blocks, shots=1000)
    counts = simulate(plan, dev, exact=True)
    f = []
    for b in range(3):
        probs = counts.for_block(plan, b) / plan.shots
        ideal = np.abs(plan.sequence_unitaries(b)[:, :, 0]) ** 2
        f.append(np.mean(np.sum(probs * kappa * (ideal - 1 / d), axis=1)))
    lam = (np.trace(err.ptm) - 1) / 3
    povm = [np.diag(dev.readout[x]) for x in range(2)]  # E_x = sum_x' C[x, x'] |x'><x'|
    s = sum(np.trace(povm[x] @ err.apply(np.diag(np.eye(2)[x]))).real for x in range(2))
    c = d / (d - 1) ** 2 * (s - 1) * (dev.prep[0, 0].real - 1 / d)
    assert f[0] == pytest.approx(c, abs=1e-12)
    assert f[1] / f[0] == pytest.approx(lam, abs=1e-12) and f[2] / f[1] == pytest.approx(lam, abs=1e-12)


# ---- vectorized simulation against a slow per-sequence loop --------------------------------
def slow_probabilities(plan, dev, kraus_error, kraus_gates, kraus_inter):
    """Per-sequence density-matrix loop, gate by gate, with explicit Kraus operators."""
    n = plan.n_qubits
    rows_out = {}
    for block in plan.blocks:
        for k, row in enumerate(np.asarray(block.cliffords)):
            rho = np.array(dev.prep, dtype=complex)
            for idx in row:
                if kraus_gates is None:
                    u = clifford.clifford_unitaries(n, [idx])[0]
                    rho = u @ rho @ u.conj().T
                else:
                    for name, qubits in clifford.clifford_circuits(n, [idx])[0]:
                        g = embed_full(clifford.gate_unitary(name), qubits, n)
                        rho = g @ rho @ g.conj().T
                        if name in kraus_gates:
                            rho = apply_kraus([embed_full(kk, qubits, n) for kk in kraus_gates[name]], rho)
                rho = apply_kraus(kraus_error, rho)
                if block.kind == SequenceKind.INTERLEAVED:
                    g = np.asarray(plan.interleave.unitary)
                    rho = apply_kraus(kraus_inter, g @ rho @ g.conj().T)
            rows_out[block.first_id + k] = dev.readout @ np.real(np.diag(rho))
    ids = sorted(rows_out)
    return np.array(ids), np.array([rows_out[i] for i in ids])


@pytest.mark.parametrize("n", [1, 2, 3])
def test_vectorized_matches_slow_loop(n):
    rng = np.random.default_rng(20 + n)
    d = 2**n
    err = channels.random_channel(n, 0.3, rng)
    inter = channels.random_channel(n, 0.2, rng)
    w = rng.uniform(0.5, 1, d)
    prep = np.diag(w / w.sum())
    conf = rng.uniform(0, 0.1, (d, d)) + np.eye(d)
    conf /= conf.sum(axis=0)
    dev = Device.build(n, error=err, interleaved_error=inter, prep=prep, confusion=conf)
    g = scipy.linalg.expm(-0.5j * 0.4 * kron(*([X] * n)))
    plan = make_block_plan(n, [(SequenceKind.REFERENCE, random_rows(n, 7, 1, rng)),
                               (SequenceKind.REFERENCE, random_rows(n, 5, 5, rng)),
                               (SequenceKind.INTERLEAVED, random_rows(n, 6, 3, rng))],
                           interleave=InterleavedGate(label="rxx", unitary=g))
    got = simulate(plan, dev, exact=True)
    ids, expected = slow_probabilities(plan, dev, err.kraus(), None, inter.kraus())
    assert np.array_equal(got.sequence_ids, ids)
    assert np.allclose(got.counts / plan.shots, expected, atol=1e-12)


@pytest.mark.parametrize("n", [2, 3])
def test_gate_dependent_noise_matches_slow_loop(n):
    rng = np.random.default_rng(31 + n)
    # A non-symmetric two-qubit channel on cz also checks that it lands on the gate's qubit order.
    gate_errors = {"cz": channels.random_channel(2, 0.2, rng), "h": channels.random_channel(1, 0.2, rng),
                   "s": channels.amplitude_damping(0.1), "cx": channels.random_channel(2, 0.2, rng)}
    err = channels.random_channel(n, 0.1, rng)
    dev = Device.build(n, error=err, gate_errors=gate_errors, prep_flip=[0.02] * n, readout=[(0.01, 0.02)] * n)
    g = scipy.linalg.expm(-0.5j * 0.3 * kron(*([Y] * n)))
    plan = make_block_plan(n, [(SequenceKind.REFERENCE, random_rows(n, 8, 4, rng)),
                               (SequenceKind.INTERLEAVED, random_rows(n, 4, 2, rng))],
                           interleave=InterleavedGate(label="ryy", unitary=g))
    got = simulate(plan, dev, exact=True)
    ids, expected = slow_probabilities(plan, dev, err.kraus(), {k: v.kraus() for k, v in gate_errors.items()},
                                       [np.eye(2**n)])
    assert np.array_equal(got.sequence_ids, ids)
    assert np.allclose(got.counts / plan.shots, expected, atol=1e-12)
    used = {q for c in clifford.clifford_circuits(n, np.asarray(plan.blocks[0].cliffords).ravel())
            for _, q in c if len(q) == 2}
    if n == 3:  # two-qubit errors exercised on several ordered pairs, e.g. (0, 1) and (1, 0)
        assert any((b, a) in used for a, b in used)


def test_gate_dependent_noise_scales_with_compiled_gate_count():
    # Depolarizing commutes with unitaries, so a one-qubit Clifford compiled to k noisy gates
    # shrinks the Bloch vector by q**k: P(0) = 1/2 + q**k (P_ideal(0) - 1/2) (common practice).
    q = 0.9
    dev = Device.build(1, gate_errors={g: channels.depolarizing(1, q) for g in ("h", "s", "sdg", "x", "y", "z")})
    rows = np.arange(24)[:, None]
    plan = make_block_plan(1, [(SequenceKind.REFERENCE, rows)])
    got = simulate(plan, dev, exact=True).counts[:, 0] / plan.shots
    ideal = np.abs(clifford.clifford_unitaries(1, rows[:, 0])[:, 0, 0]) ** 2
    k = np.array([len(c) for c in clifford.clifford_circuits(1, rows[:, 0])])
    assert np.allclose(got, 0.5 + q**k * (ideal - 0.5), atol=1e-13)
    assert len(set(k.tolist())) > 1  # circuits of different sizes: the error depends on compilation


def test_noise_on_cz_only_follows_the_cz_count():
    # Two-qubit depolarizing with decay q after each cz commutes with every later unitary, so a
    # Clifford compiled with k cz gates gives p = q**k p_ideal + (1 - q**k) / 4 (common practice);
    # Cliffords without cz are untouched (the compiled circuits use cz as their entangling gate).
    q = 0.5
    rng = np.random.default_rng(41)
    rows = random_rows(2, 60, 1, rng)
    plan = make_block_plan(2, [(SequenceKind.REFERENCE, rows)])
    clean = simulate(plan, Device.build(2), exact=True).counts / plan.shots
    noisy = simulate(plan, Device.build(2, gate_errors={"cz": channels.depolarizing(2, q)}), exact=True).counts
    k = np.array([sum(name == "cz" for name, _ in c) for c in clifford.clifford_circuits(2, rows[:, 0])])
    assert (k == 0).any() and (k > 0).any()
    expected = q ** k[:, None] * clean + (1 - q ** k[:, None]) / 4
    assert np.allclose(noisy / plan.shots, expected, atol=1e-13)


# ---- shots and bookkeeping -----------------------------------------------------------------
def test_multinomial_shots_total_and_reproducibility():
    plan = make_plan(n_qubits=2, lengths=[1, 2, 8], sequences=30, shots=250, seed=4)
    dev = Device.build(2, error=channels.depolarizing(2, 0.95), readout=[(0.02, 0.04)] * 2)
    a = simulate(plan, dev, seed=123)
    b = simulate(plan, dev, seed=123)
    c = simulate(plan, dev, seed=124)
    assert np.all(a.shots == 250) and not a.exact
    assert np.array_equal(a.counts, np.round(a.counts))
    assert a.fingerprint == b.fingerprint and a.fingerprint != c.fingerprint
    assert a.plan_fingerprint == plan.fingerprint
    assert np.array_equal(a.sequence_ids, np.sort(np.asarray(plan.sequence_ids)))
    ex = simulate(plan, dev, exact=True)
    assert ex.exact and np.allclose(ex.shots, 250)
    # Pooled frequencies agree with the exact probabilities to within 5 standard deviations.
    total = a.counts.sum()
    freq = a.counts.sum(axis=0) / total
    pex = ex.counts.sum(axis=0) / ex.counts.sum()
    assert np.all(np.abs(freq - pex) < 5 * np.sqrt(pex * (1 - pex) / total))


def test_simulate_rejects_bad_arguments():
    plan = make_plan(n_qubits=1, lengths=[1, 2], sequences=2, shots=10, seed=0)
    with pytest.raises(ValueError, match="device has 2 qubit"):
        simulate(plan, Device.build(2))
    with pytest.raises(TypeError, match="'plan' must be a robusttomo Plan"):
        simulate("plan.h5", Device.build(1))
    with pytest.raises(TypeError, match="'device' must be a Device"):
        simulate(plan, channels.identity(1))
    with pytest.raises(TypeError, match="'exact' must be a bool"):
        simulate(plan, Device.build(1), exact="yes")
    with pytest.raises(TypeError, match="'seed' must be a non-negative integer, a numpy Generator or None"):
        simulate(plan, Device.build(1), seed=-3)


def test_docstring_examples_run():
    import doctest
    import importlib

    mod = importlib.import_module("robusttomo.simulate")

    result = doctest.testmod(mod, optionflags=doctest.ELLIPSIS)
    assert result.attempted >= 3 and result.failed == 0
