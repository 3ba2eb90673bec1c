"""Tests of robusttomo.plan: plan construction, HDF5 files, OpenQASM 3 export."""

from __future__ import annotations

import importlib
import json
import math
import tempfile
from pathlib import Path

import h5py

from robusttomo import _io
import numpy as np
import openqasm3
import pytest
import scipy.stats
import stim
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from openqasm3 import ast

from robusttomo.clifford import Clifford, clifford_group_order, gate_unitary, random_clifford_indices
from robusttomo.errors import DataError
from robusttomo.plan import (InterleavedGate, Plan, SequenceBlock, SequenceKind, export_qasm, load_plan,
                             make_plan, save_plan)

P = importlib.import_module("robusttomo.plan")  # the module itself, even if a package name shadows it


def _same_up_to_phase(a: np.ndarray, b: np.ndarray, atol: float = 1e-9) -> bool:
    d = a.shape[-1]
    return bool(abs(abs(np.trace(a.conj().T @ b)) / d - 1) < atol and np.allclose(a.conj().T @ a, np.eye(d)))


def _haar(d: int, seed: int) -> np.ndarray:
    return scipy.stats.unitary_group.rvs(d, random_state=np.random.default_rng(seed))


# ---- standard gates against external references --------------------------------------------------
@pytest.mark.parametrize("ours, stim_name", [
    ("x", "X"), ("y", "Y"), ("z", "Z"), ("h", "H"), ("s", "S"), ("sdg", "S_DAG"), ("sx", "SQRT_X"),
    ("sxdg", "SQRT_X_DAG"), ("id", "I"), ("cx", "CX"), ("cy", "CY"), ("cz", "CZ"), ("swap", "SWAP"),
    ("iswap", "ISWAP"),
])
def test_standard_gate_matches_stim(ours: str, stim_name: str) -> None:
    # stim (general-purpose stabilizer library): big endian puts the first target in the leftmost
    # factor, our qubit order; for CX/CY the first target is the control.
    ref = stim.Tableau.from_named_gate(stim_name).to_unitary_matrix(endian="big").astype(complex)
    g = InterleavedGate.standard(ours)
    assert _same_up_to_phase(ref, g.unitary, atol=1e-6)  # stim returns complex64
    assert g.is_clifford


def test_non_clifford_standard_gates() -> None:
    # T = diag(1, exp(i pi/4)) (common practice; OpenQASM 3 stdgates.inc defines t as p(pi/4))
    assert np.allclose(InterleavedGate.standard("t").unitary, np.diag([1, np.exp(1j * np.pi / 4)]))
    assert not InterleavedGate.standard("t").is_clifford
    sq = InterleavedGate.standard("sqrt_iswap").unitary
    iswap = stim.Tableau.from_named_gate("ISWAP").to_unitary_matrix(endian="big").astype(complex)
    assert _same_up_to_phase(sq @ sq, iswap, atol=1e-6)
    assert not InterleavedGate.standard("sqrt_iswap").is_clifford
    # Toffoli flips the last qubit iff both controls are 1; Fredkin swaps qubits 1, 2 iff qubit 0
    # is 1 (common practice)
    ccx = InterleavedGate.standard("ccx").unitary
    assert np.array_equal(np.abs(ccx), np.eye(8)[[0, 1, 2, 3, 4, 5, 7, 6]])
    cswap = InterleavedGate.standard("cswap").unitary
    assert np.array_equal(np.abs(cswap), np.eye(8)[[0, 1, 2, 3, 4, 6, 5, 7]])
    # ch: controlled Hadamard
    ch = InterleavedGate.standard("ch").unitary
    assert np.allclose(ch[2:, 2:], gate_unitary("h")) and np.allclose(ch[:2, :2], np.eye(2))


@pytest.mark.parametrize("name", ["h", "s", "sdg", "x", "y", "z", "cx", "cz"])
def test_standard_gates_agree_with_clifford_module(name: str) -> None:
    assert _same_up_to_phase(gate_unitary(name), InterleavedGate.standard(name).unitary)


def test_standard_gate_placement() -> None:
    # cx with qubit 2 as control and qubit 0 as target on 3 qubits: |x0 x1 x2> -> |x0^x2, x1, x2>
    g = InterleavedGate.standard("cx", n_qubits=3, qubits=(2, 0))
    assert g.label == "cx(q2,q0)" and g.qubits == (2, 0)
    for x in range(8):
        b0, b1, b2 = (x >> 2) & 1, (x >> 1) & 1, x & 1
        y = ((b0 ^ b2) << 2) | (b1 << 1) | b2
        assert g.unitary[y, x] == 1
    # one-qubit gate on qubit 1 of 2: I (x) X
    assert np.allclose(InterleavedGate.standard("x", n_qubits=2, qubits=[1]).unitary,
                       np.kron(np.eye(2), [[0, 1], [1, 0]]))


@pytest.mark.parametrize("kwargs, exc, match", [
    ({"name": "foo"}, ValueError, "unknown standard gate 'foo'"),
    ({"name": 3}, TypeError, "'name' must be a string"),
    ({"name": "cz", "n_qubits": 1}, ValueError, "acts on 2 qubits but 'n_qubits' is 1"),
    ({"name": "x", "n_qubits": 2, "qubits": (2,)}, ValueError, r"1 distinct qubit indices in 0..1; got \[2\]"),
    ({"name": "cx", "n_qubits": 2, "qubits": (1, 1)}, ValueError, "2 distinct qubit indices"),
    ({"name": "cx", "n_qubits": 2, "qubits": (0.0, 1)}, TypeError, "'qubits' must be a sequence of integers"),
    ({"name": "x", "n_qubits": 4}, ValueError, "'n_qubits' must be 1, 2 or 3"),
])
def test_standard_gate_validation(kwargs: dict, exc: type, match: str) -> None:
    name = kwargs.pop("name")
    with pytest.raises(exc, match=match):
        InterleavedGate.standard(name, **kwargs)


def test_interleaved_gate_constructor_validation() -> None:
    with pytest.raises(ValueError, match="not unitary"):
        InterleavedGate(label="g", unitary=np.diag([1.0, 0.5]))
    with pytest.raises(ValueError, match="dimension 2, 4 or 8"):
        InterleavedGate(label="g", unitary=np.eye(3))
    with pytest.raises(ValueError, match="'label' must be 1 to 100 printable"):
        InterleavedGate(label="a\nb", unitary=np.eye(2))
    with pytest.raises(TypeError, match="'label' must be a string"):
        InterleavedGate(label=None, unitary=np.eye(2))  # type: ignore[arg-type]
    with pytest.raises(ValueError, match="does not match the standard gate 'cz'"):
        InterleavedGate(label="cz", unitary=np.eye(4), name="cz", qubits=(0, 1))
    with pytest.raises(ValueError, match="'qubits' applies to standard gates only"):
        InterleavedGate(label="u", unitary=np.eye(4), qubits=(0, 1))
    u = np.eye(2, dtype=complex)
    g = InterleavedGate(label="u", unitary=u)
    u[0, 0] = 5  # the gate holds its own read-only copy
    assert g.unitary[0, 0] == 1 and not g.unitary.flags.writeable


# ---- user unitary files --------------------------------------------------------------------------
def _write_json_unitary(path: Path, u: np.ndarray, *, wrap: bool = False, label: str | None = None) -> None:
    rows = [[[float(v.real), float(v.imag)] for v in row] for row in u]
    doc: object = {"unitary": rows, **({"label": label} if label else {})} if wrap else rows
    path.write_text(json.dumps(doc))


def test_from_file_npy_and_json(tmp_path: Path) -> None:
    u = _haar(4, 1)
    np.save(tmp_path / "g.npy", u)
    g = InterleavedGate.from_file(tmp_path / "g.npy")
    assert g.label == "g" and g.name is None and np.allclose(g.unitary, u, atol=1e-14)
    _write_json_unitary(tmp_path / "h.json", u)
    assert np.allclose(InterleavedGate.from_file(tmp_path / "h.json").unitary, u, atol=1e-14)
    _write_json_unitary(tmp_path / "k.json", u, wrap=True, label="fancy")
    assert InterleavedGate.from_file(tmp_path / "k.json").label == "fancy"
    assert InterleavedGate.from_file(tmp_path / "k.json", label="mine").label == "mine"


def test_from_file_rounded_text_is_reunitarized(tmp_path: Path) -> None:
    h = np.round(np.array([[1, 1], [1, -1]]) / math.sqrt(2), 7)  # 7 digits: off by ~1e-8
    _write_json_unitary(tmp_path / "h.json", h)
    g = InterleavedGate.from_file(tmp_path / "h.json")
    assert np.max(np.abs(g.unitary.conj().T @ g.unitary - np.eye(2))) < 1e-14
    assert np.allclose(g.unitary, h, atol=1e-7)


@pytest.mark.parametrize("content, match", [
    ("not json", "not valid UTF-8 JSON"),
    ('{"label": "x"}', "has no field 'unitary'"),
    ("[[[1, 0], [0, 0]], [[0, 0], [0.5, 0]]]", "is not unitary"),
    ("[[[1, 0], [0, 0]]]", "row 0 must be a list of 1"),
    ("[[[1, 0]]]", "dimension 2, 4 or 8"),
    ('[[[1, 0], "a"], [[0, 0], [1, 0]]]', "row 0 column 1 must be a pair"),
    ("[[[1, 0], [0, 0]], [[0, 0], [true, 0]]]", "row 1 column 1 must be a pair"),
    ("[[[1, 0], [0, 0]], [[0, 0], [NaN, 0]]]", "NaN or inf"),
    ("[]", "non-empty list of rows"),
    ('{"unitary": [[[1, 0], [0, 0]], [[0, 0], [1, 0]]], "label": 5}', "'label' must be a string"),
])
def test_from_file_json_errors(tmp_path: Path, content: str, match: str) -> None:
    f = tmp_path / "bad.json"
    f.write_text(content)
    with pytest.raises(DataError, match=match) as info:
        InterleavedGate.from_file(f)
    assert str(f) in str(info.value)


def test_from_file_npy_errors(tmp_path: Path) -> None:
    cases = {
        "obj.npy": lambda p: np.save(p, np.array([{"a": 1}], dtype=object), allow_pickle=True),
        "str.npy": lambda p: np.save(p, np.array([["a", "b"], ["c", "d"]])),
        "rect.npy": lambda p: np.save(p, np.zeros((2, 3))),
        "nonu.npy": lambda p: np.save(p, np.ones((2, 2))),
        "junk.npy": lambda p: p.write_bytes(b"\x93NUMPY garbage"),
    }
    for name, write in cases.items():
        write(tmp_path / name)
        with pytest.raises(DataError, match=name):
            InterleavedGate.from_file(tmp_path / name)
    with pytest.raises(DataError, match="does not exist"):
        InterleavedGate.from_file(tmp_path / "missing.npy")
    (tmp_path / "big.json").write_bytes(b" " * (2**20 + 1))
    with pytest.raises(DataError, match="larger than 1 MiB"):
        InterleavedGate.from_file(tmp_path / "big.json")
    (tmp_path / "g.txt").write_text("1 0 0 1")
    with pytest.raises(DataError, match="unsupported file type"):
        InterleavedGate.from_file(tmp_path / "g.txt")


@settings(max_examples=60, deadline=None)
@given(st.one_of(st.binary(max_size=300), st.recursive(
    st.one_of(st.none(), st.booleans(), st.floats(allow_nan=True), st.integers(), st.text(max_size=5)),
    lambda inner: st.one_of(st.lists(inner, max_size=5), st.dictionaries(st.sampled_from(["unitary", "label", "x"]),
                                                                         inner, max_size=3)),
    max_leaves=30).map(lambda d: json.dumps(d).encode())), st.sampled_from([".json", ".npy"]))
def test_from_file_never_crashes(data: bytes, suffix: str) -> None:
    with tempfile.TemporaryDirectory() as d:
        f = Path(d) / f"u{suffix}"
        f.write_bytes(data)
        try:
            g = InterleavedGate.from_file(f)
        except DataError:
            return
        assert np.allclose(g.unitary.conj().T @ g.unitary, np.eye(g.unitary.shape[0]))


# ---- make_plan ------------------------------------------------------------------------------------
@pytest.mark.parametrize("kwargs, exc, match", [
    ({"lengths": [0, 2, 4]}, ValueError, r"'lengths' must be positive integers; got \[0, 2, 4\]"),
    ({"lengths": [1, 2.5]}, TypeError, r"'lengths' must be positive integers; got \[1, 2.5\]"),
    ({"lengths": [1, True]}, TypeError, "'lengths' must be positive integers"),
    ({"lengths": "12"}, TypeError, "'lengths' must be a sequence of positive integers"),
    ({"lengths": []}, ValueError, "non-empty"),
    ({"lengths": [1, 2, 2]}, ValueError, r"must not repeat a length; got \[1, 2, 2\]"),
    ({"lengths": [2, 4, 8]}, ValueError, r"must include 1 and 2 .* add \[1\]"),
    ({"lengths": [1, 4]}, ValueError, r"add \[2\]"),
    ({"lengths": [1, 2], "sequences": [3]}, ValueError, r"one count per length \(2 for lengths \[1, 2\]\); got 1"),
    ({"sequences": 0}, ValueError, "'sequences' must be a positive integer; got 0"),
    ({"lengths": [1, 2], "sequences": [3, -1]}, ValueError, r"'sequences' must be positive integers; got \[3, -1\]"),
    ({"sequences": 2.0}, TypeError, "'sequences' must be a positive integer or one"),
    ({"sequences": [1.0, 2, 3, 4, 5, 6]}, TypeError, "'sequences' must be positive integers"),
    ({"shots": 0}, ValueError, "'shots' must be an integer in 1..1000000000; got 0"),
    ({"shots": 10.0}, TypeError, "'shots' must be an integer; got 10.0"),
    ({"seed": -1}, ValueError, "'seed' must be an integer in 0..; got -1"),
    ({"seed": "1"}, TypeError, "'seed' must be an integer"),
    ({"n_qubits": 4}, ValueError, "'n_qubits' must be 1, 2 or 3; got 4"),
    ({"n_qubits": 1.0}, TypeError, "'n_qubits' must be an integer"),
    ({"interleave": "foo"}, ValueError, "'interleave' must name a standard gate"),
    ({"interleave": "x", "n_qubits": 2}, ValueError, r"acts on 1 qubit\(s\) but the plan has 2; place it"),
    ({"interleave": 5}, TypeError, "'interleave' must be a gate name, an InterleavedGate or None; got int"),
    ({"interleave": InterleavedGate.standard("cz")}, ValueError, r"acts on 2 qubit\(s\) but 'n_qubits' is 1"),
    ({"include_reference": False}, ValueError, "include_reference=False needs an 'interleave' gate"),
    ({"include_reference": 0, "interleave": "x"}, TypeError, "'include_reference' must be True or False"),
    ({"lengths": [1, 2, 5000], "sequences": 20000}, ValueError, "at most 67108864 are supported"),
])
def test_make_plan_validation(kwargs: dict, exc: type, match: str) -> None:
    args = {"n_qubits": 1, "seed": 0, "sequences": 2, **kwargs}
    with pytest.raises(exc, match=match.replace("0..;", r"0\.\.9223372036854775807;")):
        make_plan(**args)


def test_make_plan_defaults() -> None:
    for n, lens in [(1, (1, 2, 3, 6, 12, 24)), (2, (1, 2, 3, 4, 8, 16)), (3, (1, 2, 3, 4, 8, 16))]:
        plan = make_plan(n_qubits=n, seed=0)
        assert plan.shots == 100 and plan.interleave is None
        assert plan.lengths == {SequenceKind.REFERENCE: lens}
        counts = [b.n_sequences for b in plan.blocks]
        short, long_ = counts[:3], counts[3:]
        assert len(set(short)) == 1 and len(set(long_)) == 1 and short[0] > long_[0]
    # user lengths without counts: short lengths get the short default, long ones the long one
    plan = make_plan(n_qubits=1, lengths=[1, 2, 5], seed=0)
    assert [b.n_sequences for b in plan.blocks] == [200, 200, 50]


def test_make_plan_sorts_lengths_with_counts() -> None:
    plan = make_plan(n_qubits=1, lengths=[8, 1, 2], sequences=[3, 4, 5], seed=0, shots=7)
    assert [(b.length, b.n_sequences) for b in plan.blocks] == [(1, 4), (2, 5), (8, 3)]
    assert plan.shots == 7


def test_make_plan_determinism_and_sampling() -> None:
    a = make_plan(n_qubits=2, lengths=[1, 2, 4], sequences=[5, 6, 7], seed=42, interleave="cz")
    b = make_plan(n_qubits=2, lengths=[1, 2, 4], sequences=[5, 6, 7], seed=42, interleave="cz")
    c = make_plan(n_qubits=2, lengths=[1, 2, 4], sequences=[5, 6, 7], seed=43, interleave="cz")
    assert a == b and a.fingerprint == b.fingerprint
    assert all(np.array_equal(x.cliffords, y.cliffords) for x, y in zip(a.blocks, b.blocks))
    assert a.fingerprint != c.fingerprint
    # the documented draw order: one rng, block after block, row-major (K, m)
    rng = np.random.default_rng(42)
    for blk in a.blocks:
        want = random_clifford_indices(2, blk.n_sequences * blk.length, rng).reshape(blk.n_sequences, blk.length)
        assert np.array_equal(blk.cliffords, want)
    assert all(blk.cliffords.dtype == np.int64 and not blk.cliffords.flags.writeable for blk in a.blocks)


def test_make_plan_uniform_over_one_qubit_group() -> None:
    plan = make_plan(n_qubits=1, lengths=[1, 2], sequences=[4800, 2400], seed=5)
    idx = np.concatenate([b.cliffords.ravel() for b in plan.blocks])
    freq = np.bincount(idx, minlength=24)
    assert freq.size == 24 == clifford_group_order(1)
    # chi-square goodness of fit to the uniform distribution (common practice); fixed seed
    assert scipy.stats.chisquare(freq).pvalue > 1e-3


def test_sequence_ids_and_lookup() -> None:
    plan = make_plan(n_qubits=1, lengths=[1, 2, 3], sequences=[3, 4, 5], seed=1, interleave="h")
    ids = plan.sequence_ids
    assert ids.dtype == np.int64 and np.array_equal(ids, np.arange(plan.n_sequences))
    assert len(np.unique(ids)) == plan.n_sequences == 24
    for sid in ids:
        i, row = plan.locate(int(sid))
        assert plan.blocks[i].first_id + row == sid
    with pytest.raises(ValueError, match="no sequence with id 24"):
        plan.locate(24)
    assert plan.block("interleaved", 2) is plan.blocks[4]
    assert plan.block(SequenceKind.REFERENCE, 3).n_sequences == 5
    with pytest.raises(ValueError, match=r"no reference block of length 7; its reference lengths are \[1, 2, 3\]"):
        plan.block("reference", 7)
    with pytest.raises(ValueError, match="'kind' must be one of"):
        plan.block("bogus", 1)


def test_interleaved_plan_contents() -> None:
    plan = make_plan(n_qubits=2, lengths=[1, 2, 3], sequences=[4, 5, 6], seed=3, interleave="iswap")
    assert plan.interleave == InterleavedGate.standard("iswap")
    assert plan.lengths == {SequenceKind.REFERENCE: (1, 2, 3), SequenceKind.INTERLEAVED: (1, 2, 3)}
    for m, k in [(1, 4), (2, 5), (3, 6)]:
        r, i = plan.block("reference", m), plan.block("interleaved", m)
        assert r.n_sequences == i.n_sequences == k
        assert not np.array_equal(r.cliffords, i.cliffords)  # drawn independently
    only = make_plan(n_qubits=2, lengths=[1, 2], sequences=3, seed=3, interleave="iswap", include_reference=False)
    assert [b.kind for b in only.blocks] == [SequenceKind.INTERLEAVED] * 2
    assert only.sequence_ids.tolist() == list(range(6))


def _slow_unitary(n: int, row: np.ndarray, g: np.ndarray | None) -> np.ndarray:
    u = np.eye(2**n, dtype=complex)
    for idx in row:
        u = Clifford.from_index(n, int(idx)).unitary() @ u
        if g is not None:
            u = g @ u
    return u


@pytest.mark.parametrize("n, gate", [(1, None), (1, "t"), (2, "cz"), (2, "sqrt_iswap"), (3, None), (3, "ccx")])
def test_sequence_unitaries_against_slow_product(n: int, gate: str | None) -> None:
    plan = make_plan(n_qubits=n, lengths=[1, 2, 5], sequences=3, seed=11, interleave=gate)
    for bi, blk in enumerate(plan.blocks):
        us = plan.sequence_unitaries(bi)
        assert us.shape == (3, 2**n, 2**n) and us.dtype == complex
        g = plan.interleave.unitary if blk.kind is SequenceKind.INTERLEAVED else None
        for k in range(blk.n_sequences):
            assert np.allclose(us[k], _slow_unitary(n, blk.cliffords[k], g), atol=1e-12)
    with pytest.raises(ValueError, match="'block_index' must be an integer in 0.."):
        plan.sequence_unitaries(len(plan.blocks))


def test_interleaved_unitary_order() -> None:
    # G acts after each Clifford: for m = 1 the sequence runs G C_1, not C_1 G
    plan = make_plan(n_qubits=1, lengths=[1, 2], sequences=30, seed=2, interleave="t")
    blk = plan.block("interleaved", 1)
    us = plan.sequence_unitaries(plan.block_index("interleaved", 1))
    t = np.diag([1, np.exp(1j * np.pi / 4)])
    c = [Clifford.from_index(1, int(i)).unitary() for i in blk.cliffords[:, 0]]
    assert all(np.allclose(u, t @ ci) for u, ci in zip(us, c))
    assert not all(np.allclose(u, ci @ t) for u, ci in zip(us, c))


def test_plan_direct_construction_validation() -> None:
    blk = SequenceBlock(kind="reference", length=1, cliffords=np.array([[0], [1]]), first_id=0)
    assert blk.kind is SequenceKind.REFERENCE
    with pytest.raises(ValueError, match=r"'cliffords' must have shape \(K, 2\)"):
        SequenceBlock(kind=SequenceKind.REFERENCE, length=2, cliffords=np.zeros((3, 1), int), first_id=0)
    with pytest.raises(TypeError, match="'cliffords' must be an integer numpy array"):
        SequenceBlock(kind=SequenceKind.REFERENCE, length=1, cliffords=np.zeros((3, 1)), first_id=0)
    with pytest.raises(ValueError, match="'kind' must be one of"):
        SequenceBlock(kind="other", length=1, cliffords=np.zeros((3, 1), int), first_id=0)
    with pytest.raises(ValueError, match="out of range for 1 qubit"):
        Plan(n_qubits=1, shots=1, seed=0, blocks=(SequenceBlock(SequenceKind.REFERENCE, 1, np.array([[24]]), 0),))
    b2 = SequenceBlock(SequenceKind.REFERENCE, 2, np.zeros((2, 2), int), 1)
    with pytest.raises(ValueError, match="sequence ids of the blocks overlap"):
        Plan(n_qubits=1, shots=1, seed=0, blocks=(blk, b2))
    bi = SequenceBlock(SequenceKind.INTERLEAVED, 1, np.zeros((1, 1), int), 5)
    with pytest.raises(ValueError, match="interleaved blocks but no 'interleave'"):
        Plan(n_qubits=1, shots=1, seed=0, blocks=(blk, bi))
    with pytest.raises(ValueError, match="'interleave' gate but no interleaved block"):
        Plan(n_qubits=1, shots=1, seed=0, blocks=(blk,), interleave=InterleavedGate.standard("x"))
    dup = SequenceBlock(SequenceKind.REFERENCE, 1, np.zeros((1, 1), int), 9)
    with pytest.raises(ValueError, match="two reference blocks of length 1"):
        Plan(n_qubits=1, shots=1, seed=0, blocks=(blk, dup))


# ---- HDF5 round trip ------------------------------------------------------------------------------
def _plans() -> list[Plan]:
    return [
        make_plan(n_qubits=1, lengths=[1, 2, 3], sequences=[2, 3, 4], seed=1),
        make_plan(n_qubits=2, lengths=[1, 2, 4], sequences=3, seed=2, shots=1000, interleave="sqrt_iswap"),
        make_plan(n_qubits=3, lengths=[1, 2], sequences=2, seed=3,
                  interleave=InterleavedGate.standard("cx", n_qubits=3, qubits=(2, 1))),
        make_plan(n_qubits=2, lengths=[1, 2], sequences=2, seed=4, include_reference=False,
                  interleave=InterleavedGate(label="haar", unitary=_haar(4, 7))),
    ]


@pytest.mark.parametrize("index", range(4))
def test_save_load_round_trip(tmp_path: Path, index: int) -> None:
    plan = _plans()[index]
    out = save_plan(plan, tmp_path / "p.h5")
    assert out == tmp_path / "p.h5"
    back = load_plan(out)
    assert back == plan and back.fingerprint == plan.fingerprint
    assert (back.n_qubits, back.shots, back.seed) == (plan.n_qubits, plan.shots, plan.seed)
    assert back.interleave == plan.interleave
    assert len(back.blocks) == len(plan.blocks) and all(x == y for x, y in zip(back.blocks, plan.blocks))
    assert np.array_equal(back.sequence_ids, plan.sequence_ids)
    for bi in range(len(plan.blocks)):
        assert np.array_equal(back.sequence_unitaries(bi), plan.sequence_unitaries(bi))
    assert [p.name for p in tmp_path.iterdir()] == ["p.h5"]  # no temporary file left behind
    with h5py.File(out) as f:  # the documented schema
        assert f.attrs["schema_version"] == 1 and f.attrs["kind"] == b"robusttomo-plan"  # fixed-length UTF-8
        assert f.attrs["fingerprint"].decode() == plan.fingerprint
        assert f.attrs["convention"].decode() == P.CONVENTION
        b0 = f["blocks/000"]
        circ = b0["circuits"].asstr()[()]
        for (k, j), idx in np.ndenumerate(b0["cliffords"][()]):
            gates = Clifford.from_index(plan.n_qubits, int(idx)).circuit()
            assert circ[k, j] == "; ".join(f"{g} " + ", ".join(f"q[{q}]" for q in qs) for g, qs in gates)


def test_save_refuses_overwrite(tmp_path: Path) -> None:
    a, b = _plans()[:2]
    save_plan(a, tmp_path / "p.h5")
    with pytest.raises(FileExistsError, match="pass --force"):
        save_plan(b, tmp_path / "p.h5")
    assert load_plan(tmp_path / "p.h5") == a
    save_plan(b, tmp_path / "p.h5", force=True)
    assert load_plan(tmp_path / "p.h5") == b
    with pytest.raises(TypeError, match="'plan' must be a Plan"):
        save_plan("x", tmp_path / "q.h5")  # type: ignore[arg-type]


@pytest.fixture(scope="module")
def plan_file() -> tuple[Plan, bytes]:
    plan = make_plan(n_qubits=2, lengths=[1, 2, 3], sequences=[3, 2, 2], seed=9, interleave="cz")
    with tempfile.TemporaryDirectory() as d:
        save_plan(plan, Path(d) / "p.h5")
        return plan, (Path(d) / "p.h5").read_bytes()


def _mutated(tmp_path: Path, data: bytes, edit) -> Path:
    f = tmp_path / "m.h5"
    f.write_bytes(data)
    with h5py.File(f, "r+") as h:
        edit(h)
    return f


def _replace(h: h5py.File, name: str, value: object) -> None:
    del h[name]
    h[name] = value


@pytest.mark.parametrize("edit, match", [
    (lambda h: h.attrs.__delitem__("schema_version"), "'schema_version' of the plan file is missing"),
    (lambda h: h.attrs.__setitem__("schema_version", 2), "schema_version 2"),
    (lambda h: h.attrs.__setitem__("kind", _io.fixed_text("robusttomo-counts")), "attribute 'kind' is 'robusttomo-counts'"),
    # variable-length text is refused before it is read (a corrupt heap can hang the HDF5 library)
    (lambda h: h.attrs.__setitem__("kind", "robusttomo-plan"), "attribute 'kind' has an unsupported type"),
    (lambda h: h.attrs.__delitem__("kind"), "attribute 'kind' of the root is missing"),
    (lambda h: h.attrs.__delitem__("fingerprint"), "attribute 'fingerprint' of the root is missing"),
    (lambda h: h.attrs.__setitem__("shots", 101), "attribute 'fingerprint' .* content hashes to"),
    (lambda h: h.attrs.__setitem__("shots", 1.5), "attribute 'shots' of the root must be an integer"),
    (lambda h: h.attrs.__setitem__("shots", 0), "'shots' must be an integer in 1"),
    (lambda h: h.attrs.__setitem__("n_qubits", 5), "'n_qubits' must be 1, 2 or 3; got 5"),
    (lambda h: h.attrs.__setitem__("convention", _io.fixed_text("other")), "attribute 'convention' differs"),
    (lambda h: h.attrs.__setitem__("n_blocks", 9), "group 'blocks/006' is missing"),
    (lambda h: h.__delitem__("blocks/001/cliffords"), "dataset 'cliffords' of block '001' is missing"),
    (lambda h: h.__delitem__("blocks/001/sequence_ids"), "dataset 'sequence_ids' of block '001' is missing"),
    (lambda h: h.__delitem__("blocks/001/circuits"), "dataset 'circuits' of block '001' is missing"),
    (lambda h: h.__delitem__("interleave"), "invalid plan content: plan has interleaved blocks"),
    (lambda h: h.__delitem__("interleave/unitary"), "dataset 'unitary' of group 'interleave' is missing"),
    (lambda h: _replace(h, "blocks/001/cliffords", np.zeros((2, 2))), "has dtype float64; expected integers"),
    (lambda h: _replace(h, "blocks/001/cliffords", np.zeros((2, 3), int)), r"has shape \(2, 3\); expected \(2, 2\)"),
    (lambda h: _replace(h, "blocks/001/cliffords", np.full((2, 2), 11520)), "row 0 column 0: index 11520 is outside"),
    (lambda h: _replace(h, "blocks/001/sequence_ids", np.array([3, 5])), "'sequence_ids' of block '001' row 1 is 5"),
    (lambda h: _replace(h, "blocks/001/circuits", np.array([[b"x q[9]"] * 2] * 2)), "row 0 column 0: not a circuit of h"),
    (lambda h: _replace(h, "blocks/001/circuits", np.array([[b"h q[0]"] * 2] * 2)), "two different circuits|does not run"),
    (lambda h: _replace(h, "blocks/001/circuits", np.zeros((2, 2))), "must hold fixed-length strings"),
    (lambda h: h["blocks/000"].attrs.__setitem__("kind", _io.fixed_text("sideways")), "'kind' of block '000' must be"),
    (lambda h: h["blocks/000"].attrs.__setitem__("length", 2), r"shape \(3, 1\); expected \(3, 2\)"),
    (lambda h: h["interleave"].attrs.__setitem__("name", _io.fixed_text("cx")), "does not match the standard gate 'cx'"),
    (lambda h: h["interleave"].attrs.__setitem__("qubits", np.array([0.5])), "'qubits' of group 'interleave'"),
    (lambda h: _replace(h, "interleave/unitary", np.eye(4)), "has dtype float64; expected complex"),
])
def test_load_rejects_damaged_files(tmp_path: Path, plan_file: tuple[Plan, bytes], edit, match: str) -> None:
    f = _mutated(tmp_path, plan_file[1], edit)
    with pytest.raises(DataError, match=match) as info:
        load_plan(f)
    assert str(f) in str(info.value)


def test_load_checks_circuits_against_indices(tmp_path: Path, plan_file: tuple[Plan, bytes]) -> None:
    plan = plan_file[0]
    idx = int(plan.blocks[0].cliffords[0, 0])
    other = (idx + 1) % 11520
    wrong = "; ".join(f"{g} " + ", ".join(f"q[{q}]" for q in qs) for g, qs in Clifford.from_index(2, other).circuit())

    def set_circuit(text: str):
        def edit(h: h5py.File) -> None:
            c = h["blocks/000/circuits"].asstr()[()]
            c[0, 0] = text
            del h["blocks/000/circuits"]
            h.create_dataset("blocks/000/circuits", data=_io.fixed_text_array(c))
        return edit

    f = _mutated(tmp_path, plan_file[1], set_circuit(wrong))
    with pytest.raises(DataError, match=f"row 0 column 0: the circuit does not run Clifford index {idx}"):
        load_plan(f)
    # an equivalent circuit (as another compiler might write) is accepted
    base = "; ".join(f"{g} " + ", ".join(f"q[{q}]" for q in qs) for g, qs in Clifford.from_index(2, idx).circuit())
    equivalent = "; ".join(p for p in ["x q[1]", "x q[1]", base] if p)
    f = _mutated(tmp_path, plan_file[1], set_circuit(equivalent))
    assert load_plan(f) == plan
    f = _mutated(tmp_path, plan_file[1], set_circuit("rx q[0]"))
    with pytest.raises(DataError, match="not a circuit of h, s, sdg"):
        load_plan(f)


def test_load_missing_and_garbage(tmp_path: Path) -> None:
    with pytest.raises(DataError, match="does not exist"):
        load_plan(tmp_path / "nope.h5")
    (tmp_path / "g.h5").write_bytes(b"\x89HDF\r\n\x1a\n" + b"\0" * 50)
    with pytest.raises(DataError, match="not a readable robusttomo plan file"):
        load_plan(tmp_path / "g.h5")
    with pytest.raises(DataError, match="does not exist"):
        load_plan(tmp_path)
    with pytest.raises(TypeError, match="'path' must be a path"):
        load_plan(3)  # type: ignore[arg-type]


def _walk(h: h5py.File) -> tuple[list[str], list[tuple[str, str]]]:
    objs: list[str] = []
    h.visit(objs.append)
    attrs = [("/", a) for a in h.attrs] + [(o, a) for o in objs for a in h[o].attrs]
    return objs, attrs


_VALUES = st.one_of(
    # (HDF5 strings cannot hold NUL characters, so the strategies leave them out)
    st.integers(-2**63, 2**63 - 1), st.floats(allow_nan=True),
    st.text(st.characters(blacklist_characters="\x00"), max_size=8),
    st.binary(max_size=8).filter(lambda b: b"\0" not in b),
    st.booleans(), st.lists(st.integers(-5, 20000), min_size=0, max_size=4).map(np.array),
    st.tuples(st.integers(0, 4), st.integers(0, 4)).map(lambda s: np.zeros(s)),
    st.tuples(st.integers(0, 4), st.integers(0, 4), st.integers(0, 11600)).map(
        lambda t: np.full(t[:2], t[2], dtype=np.int64)),
)


@settings(max_examples=120, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(data=st.data())
def test_load_never_crashes_on_mutated_files(plan_file: tuple[Plan, bytes], data: st.DataObject) -> None:
    plan, raw = plan_file
    with tempfile.TemporaryDirectory() as d:
        f = Path(d) / "m.h5"
        f.write_bytes(raw)
        with h5py.File(f, "r+") as h:
            objs, attrs = _walk(h)
            for _ in range(data.draw(st.integers(1, 3))):
                action = data.draw(st.sampled_from(["del_obj", "set_attr", "del_attr", "set_data"]))
                objs, attrs = _walk(h)
                if action == "del_obj" and objs:
                    del h[data.draw(st.sampled_from(objs))]
                elif action in ("set_attr", "del_attr") and attrs:
                    o, a = data.draw(st.sampled_from(attrs))
                    if action == "del_attr":
                        del h[o].attrs[a]
                    else:
                        h[o].attrs[a] = data.draw(_VALUES)
                elif action == "set_data":
                    sets = [o for o in objs if isinstance(h[o], h5py.Dataset)]
                    if sets:
                        _replace(h, data.draw(st.sampled_from(sets)), data.draw(_VALUES))
        try:
            back = load_plan(f)
        except DataError:
            return
        assert back == plan  # anything that loads is the original plan (fingerprint checked)


@settings(max_examples=80, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(data=st.data())
def test_load_never_crashes_on_damaged_bytes(plan_file: tuple[Plan, bytes], data: st.DataObject) -> None:
    plan, raw = plan_file
    mode = data.draw(st.sampled_from(["truncate", "flip", "garbage"]))
    if mode == "truncate":
        blob = raw[: data.draw(st.integers(0, len(raw) - 1))]
    elif mode == "flip":
        b = bytearray(raw)
        for _ in range(data.draw(st.integers(1, 8))):
            b[data.draw(st.integers(0, len(b) - 1))] ^= data.draw(st.integers(1, 255))
        blob = bytes(b)
    else:
        blob = data.draw(st.binary(max_size=2000))
    with tempfile.TemporaryDirectory() as d:
        f = Path(d) / "b.h5"
        f.write_bytes(blob)
        try:
            back = load_plan(f)
        except DataError:
            return
        assert back == plan


# ---- OpenQASM 3 export: a tiny state-vector interpreter of the parsed programs -------------------
def _u(theta: float, phi: float, lam: float) -> np.ndarray:
    # OpenQASM 3 specification, built-in gate U(theta, phi, lambda)
    c, s = math.cos(theta / 2), math.sin(theta / 2)
    return np.array([[c, -np.exp(1j * lam) * s], [np.exp(1j * phi) * s, np.exp(1j * (phi + lam)) * c]])


def _p(lam: float) -> np.ndarray:
    return np.diag([1, np.exp(1j * lam)])


def _ctrl(m: np.ndarray, neg: bool = False) -> np.ndarray:
    k = m.shape[0]
    out = np.eye(2 * k, dtype=complex)
    if neg:
        out[:k, :k] = m
    else:
        out[k:, k:] = m
    return out


# Gates of stdgates.inc, built as that file defines them (OpenQASM 3 specification; from memory):
# x = U(pi, 0, pi), y = U(pi, pi/2, pi/2), h = U(pi/2, 0, pi), z = p(pi), s = p(pi/2),
# sdg = p(-pi/2), t = p(pi/4), tdg = p(-pi/4), sx = pow(0.5) @ x, rz(t) = gphase(-t/2) U(0, 0, t),
# cx = ctrl @ x, cy = ctrl @ y, cz = ctrl @ z, ch = ctrl @ h, swap = cx a,b; cx b,a; cx a,b,
# ccx = ctrl @ ctrl @ x, cswap = ctrl @ swap, id = U(0, 0, 0).
_X = _u(math.pi, 0, math.pi)
_CX = _ctrl(_X)
_STD = {
    "x": lambda: _X, "y": lambda: _u(math.pi, math.pi / 2, math.pi / 2), "h": lambda: _u(math.pi / 2, 0, math.pi),
    "z": lambda: _p(math.pi), "s": lambda: _p(math.pi / 2), "sdg": lambda: _p(-math.pi / 2),
    "t": lambda: _p(math.pi / 4), "tdg": lambda: _p(-math.pi / 4), "id": lambda: _u(0, 0, 0),
    "sx": lambda: np.array([[1 + 1j, 1 - 1j], [1 - 1j, 1 + 1j]]) / 2,
    "cx": lambda: _CX, "cy": lambda: _ctrl(_u(math.pi, math.pi / 2, math.pi / 2)),
    "cz": lambda: _ctrl(_p(math.pi)), "ch": lambda: _ctrl(_u(math.pi / 2, 0, math.pi)),
    "ccx": lambda: _ctrl(_CX),
}
_PARAM = {"rz": lambda t: np.exp(-1j * t / 2) * _u(0, 0, t), "p": _p, "U": _u}


def _apply(mat: np.ndarray, qubits: list[int], state: np.ndarray, n: int) -> np.ndarray:
    """Left-multiply ``state`` (d x d, columns are states) by ``mat`` acting on ``qubits``."""
    k = len(qubits)
    assert len(set(qubits)) == k
    t = state.reshape((2,) * n + (-1,))
    t = np.moveaxis(t, qubits, range(k))
    shp = t.shape
    t = (mat @ t.reshape(2**k, -1)).reshape(shp)
    return np.moveaxis(t, range(k), qubits).reshape(2**n, -1)


def _swap() -> np.ndarray:
    m = np.eye(4, dtype=complex)
    for a, b in [(0, 1), (1, 0), (0, 1)]:
        m = _apply(_CX, [a, b], m, 2)
    return m


_STD["swap"] = _swap
_STD["cswap"] = lambda: _ctrl(_swap())


def _eval(e: ast.Expression, env: dict[str, float]) -> float:
    if isinstance(e, (ast.FloatLiteral, ast.IntegerLiteral)):
        return float(e.value)
    if isinstance(e, ast.UnaryExpression) and e.op.name == "-":
        return -_eval(e.expression, env)
    if isinstance(e, ast.Identifier):
        return math.pi if e.name in ("pi", "π") else env[e.name]
    raise AssertionError(f"unexpected expression {e}")


class _Interp:
    def __init__(self) -> None:
        self.defs: dict[str, ast.QuantumGateDefinition] = {}

    def gate_matrix(self, g: ast.QuantumGate, env: dict[str, float]) -> np.ndarray:
        name = g.name.name
        args = [_eval(a, env) for a in g.arguments]
        if name in self.defs:
            d = self.defs[name]
            k = len(d.qubits)
            sub = dict(zip([a.name for a in d.arguments], args))
            m = np.eye(2**k, dtype=complex)
            formal = {q.name: i for i, q in enumerate(d.qubits)}
            for st_ in d.body:
                assert isinstance(st_, ast.QuantumGate)
                m = _apply(self.gate_matrix(st_, sub), [formal[q.name] for q in st_.qubits], m, k)
            base = m
        elif name in _PARAM:
            base = _PARAM[name](*args)
        else:
            assert not args
            base = np.asarray(_STD[name](), dtype=complex)
        for mod in reversed(g.modifiers):
            assert mod.modifier.name in ("ctrl", "negctrl") and mod.argument is None
            base = _ctrl(base, neg=mod.modifier.name == "negctrl")
        return base


def _run_program(text: str, n: int) -> tuple[np.ndarray, int, list[str]]:
    """Parse with the reference parser and return (unitary, number of barriers, statement kinds)."""
    prog = openqasm3.parse(text)
    assert prog.version == "3.0"
    it = _Interp()
    state = np.eye(2**n, dtype=complex)
    barriers, kinds = 0, []
    for s in prog.statements:
        kinds.append(type(s).__name__)
        if isinstance(s, ast.Include):
            assert s.filename == "stdgates.inc"
        elif isinstance(s, ast.QubitDeclaration):
            assert s.qubit.name == "q" and s.size.value == n
        elif isinstance(s, ast.ClassicalDeclaration):
            assert s.identifier.name == "c" and isinstance(s.type, ast.BitType) and s.type.size.value == n
        elif isinstance(s, ast.QuantumGateDefinition):
            it.defs[s.name.name] = s
        elif isinstance(s, ast.QuantumGate):
            qs = []
            for q in s.qubits:
                assert isinstance(q, ast.IndexedIdentifier) and q.name.name == "q"
                qs.append(q.indices[0][0].value)
            state = _apply(it.gate_matrix(s, {}), qs, state, n)
        elif isinstance(s, ast.QuantumBarrier):
            assert [q.name for q in s.qubits] == ["q"]
            barriers += 1
        elif isinstance(s, ast.QuantumMeasurementStatement):
            assert s.measure.qubit.name == "q" and s.target.name == "c"
        else:
            raise AssertionError(f"unexpected statement {s}")
    assert kinds[-1] == "QuantumMeasurementStatement" and kinds.count("QuantumMeasurementStatement") == 1
    return state, barriers, kinds


def _check_exported(plan: Plan, programs: dict[int, str]) -> None:
    assert sorted(programs) == plan.sequence_ids.tolist()
    for bi, blk in enumerate(plan.blocks):
        want = plan.sequence_unitaries(bi)
        for row in range(blk.n_sequences):
            text = programs[blk.first_id + row]
            assert text.startswith('OPENQASM 3.0;\ninclude "stdgates.inc";\n')
            assert plan.fingerprint in text
            u, barriers, _ = _run_program(text, plan.n_qubits)
            per = 2 if blk.kind is SequenceKind.INTERLEAVED else 1
            assert barriers == per * blk.length
            assert _same_up_to_phase(want[row], u, atol=1e-9), (blk, row)


_EXPORT_CASES = [
    (1, ["t", "sxdg", None]),
    (2, ["cz", "iswap", "sqrt_iswap", "haar", "cx(1,0)", "x(1)"]),
    (3, ["haar", "ccx", "sxdg(2)"]),
]


def _gate_for(n: int, spec: str | None, seed: int) -> InterleavedGate | None:
    if spec is None:
        return None
    if spec == "haar":
        return InterleavedGate(label="haar", unitary=_haar(2**n, seed))
    if "(" in spec:
        name, qs = spec[:-1].split("(")
        return InterleavedGate.standard(name, n_qubits=n, qubits=[int(v) for v in qs.split(",")])
    return InterleavedGate.standard(spec)


@pytest.mark.parametrize("n, spec", [(n, s) for n, specs in _EXPORT_CASES for s in specs])
def test_export_qasm_runs_the_plan_unitaries(tmp_path: Path, n: int, spec: str | None) -> None:
    gate = _gate_for(n, spec, seed=13 + n)
    plan = make_plan(n_qubits=n, lengths=[1, 2, 3], sequences=2, seed=21, interleave=gate)
    paths = export_qasm(plan, tmp_path / "out")
    width = 6
    assert [p.name for p in paths] == [f"sequence_{i:0{width}d}.qasm" for i in plan.sequence_ids]
    _check_exported(plan, {int(p.stem.split("_")[1]): p.read_text() for p in paths})


def test_export_qasm_bundle_and_index(tmp_path: Path) -> None:
    plan = make_plan(n_qubits=2, lengths=[1, 2, 4], sequences=[3, 2, 2], seed=5,
                     interleave=InterleavedGate(label="haar", unitary=_haar(4, 3)))
    bundle, index = export_qasm(plan, tmp_path, bundle=True)
    assert (bundle.name, index.name) == ("sequences.qasm", "sequences.index.json")
    doc = json.loads(index.read_text())
    assert doc["schema_version"] == 1 and doc["plan_fingerprint"] == plan.fingerprint
    assert doc["bundle"] == "sequences.qasm" and "c[0]" in doc["bit_order"]
    raw = bundle.read_bytes()
    programs = {}
    for pos, e in enumerate(doc["programs"]):
        assert e["position"] == pos
        i, row = plan.locate(e["sequence_id"])
        assert (e["kind"], e["length"]) == (plan.blocks[i].kind.value, plan.blocks[i].length)
        programs[e["sequence_id"]] = raw[e["byte_offset"]: e["byte_offset"] + e["byte_length"]].decode()
    assert sum(e["byte_length"] for e in doc["programs"]) == len(raw)
    _check_exported(plan, programs)
    with pytest.raises(FileExistsError, match="sequences.qasm"):
        export_qasm(plan, tmp_path, bundle=True)
    assert export_qasm(plan, tmp_path, bundle=True, force=True) == [bundle, index]


def test_export_qasm_measures_in_documented_bit_order(tmp_path: Path) -> None:
    # a length-1 plan whose only Clifford is X on qubit 0 prepares |10>; the program measures it
    # into c with c[0] = qubit 0, which our bitstring convention prints leftmost: "10"
    x0 = next(i for i in range(11520) if _same_up_to_phase(Clifford.from_index(2, i).unitary(),
                                                           np.kron([[0, 1], [1, 0]], np.eye(2))))
    blocks = (SequenceBlock(SequenceKind.REFERENCE, 1, np.array([[x0]]), 0),)
    plan = Plan(n_qubits=2, shots=10, seed=0, blocks=blocks)
    (path,) = export_qasm(plan, tmp_path)
    text = path.read_text()
    u, _, _ = _run_program(text, 2)
    amp = u[:, 0]
    assert np.isclose(abs(amp[0b10]), 1)  # index 2 = |q0=1, q1=0>
    assert "c = measure q;" in text and "LEFTMOST" in text


def test_export_qasm_refuses_overwrite(tmp_path: Path) -> None:
    plan = make_plan(n_qubits=1, lengths=[1, 2], sequences=2, seed=0)
    paths = export_qasm(plan, tmp_path)
    before = paths[0].read_text()
    other = make_plan(n_qubits=1, lengths=[1, 2], sequences=2, seed=1)
    with pytest.raises(FileExistsError, match="sequence_000000.qasm"):
        export_qasm(other, tmp_path)
    assert paths[0].read_text() == before
    export_qasm(other, tmp_path, force=True)
    assert other.fingerprint in paths[0].read_text()
    (tmp_path / "file").write_text("")
    with pytest.raises(ValueError, match="is not a directory"):
        export_qasm(plan, tmp_path / "file")


def test_docstring_examples() -> None:
    import doctest

    res = doctest.testmod(P, verbose=False)
    assert res.attempted >= 3 and res.failed == 0


def test_interpreter_detects_a_wrong_program(tmp_path: Path) -> None:
    # the export check above can fail: a flipped control polarity or a dropped gate changes the unitary
    plan = make_plan(n_qubits=2, lengths=[1, 2], sequences=1, seed=8, include_reference=False,
                     interleave=InterleavedGate(label="haar", unitary=_haar(4, 9)))
    paths = export_qasm(plan, tmp_path)
    text = paths[1].read_text()
    want = plan.sequence_unitaries(1)[0]
    assert _same_up_to_phase(want, _run_program(text, 2)[0])
    assert "negctrl @" in text
    assert not _same_up_to_phase(want, _run_program(text.replace("negctrl @", "ctrl @", 1), 2)[0])
    lines = text.splitlines()
    first_gate = next(i for i, ln in enumerate(lines) if ln.startswith(("h ", "s ", "sdg ", "x ", "y ", "z ", "cx ", "cz ")))
    del lines[first_gate]
    assert not _same_up_to_phase(want, _run_program("\n".join(lines), 2)[0])
