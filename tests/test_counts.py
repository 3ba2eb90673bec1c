"""Tests of Counts, the counts HDF5 file and ingest of CSV / JSON results."""

from __future__ import annotations

import functools
import json

import h5py
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from robusttomo import channels
from robusttomo.counts import Counts, ingest, load_counts, save_counts
from robusttomo.errors import DataError
from robusttomo.plan import make_plan
from robusttomo.simulate import Device, simulate

FUZZ = settings(max_examples=120, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])


@functools.lru_cache(maxsize=None)
def small_plan(seed=0):
    return make_plan(n_qubits=2, lengths=[1, 2], sequences=3, shots=100, seed=seed)


@functools.lru_cache(maxsize=None)
def small_counts():
    plan = small_plan()
    dev = Device.build(2, error=channels.depolarizing(2, 0.9), readout=[(0.05, 0.1)] * 2)
    return simulate(plan, dev, seed=1)


def bitstring(x, n, order="q0-left"):
    s = format(x, f"0{n}b")  # qubit 0 = most significant bit = first character
    return s if order == "q0-left" else s[::-1]


def csv_text(counts, order="q0-left", header="sequence_id,bitstring,count"):
    lines = [header]
    for sid, row in zip(counts.sequence_ids, counts.counts):
        for x, v in enumerate(row):
            if v:
                lines.append(f"{sid},{bitstring(x, counts.n_qubits, order)},{int(v)}")
    return "\n".join(lines) + "\n"


def json_doc(counts, plan, order="q0-left"):
    return {"schema_version": 1, "plan_fingerprint": plan.fingerprint, "bit_order": order,
            "counts": {str(sid): {bitstring(x, counts.n_qubits, order): int(v) for x, v in enumerate(row) if v}
                       for sid, row in zip(counts.sequence_ids, counts.counts)}}


# ---- the Counts value ----------------------------------------------------------------------
FP = "ab" * 32


@pytest.mark.parametrize(
    ("kwargs", "exc", "match"),
    [
        ({"plan_fingerprint": "xyz"}, ValueError, "'plan_fingerprint' must be 64 lowercase hex"),
        ({"sequence_ids": np.array([1, 0])}, ValueError, "'sequence_ids' must be non-negative and strictly increasing"),
        ({"sequence_ids": np.array([0.0, 1.0])}, TypeError, "'sequence_ids' must be an integer array"),
        ({"counts": np.array([[1.0, 2.0]])}, ValueError, r"'counts' must have shape"),
        ({"counts": np.array([[1.0, -2.0], [1, 1]])}, ValueError, "'counts' must be finite and non-negative"),
        ({"counts": np.array([[1.5, 2.0], [1, 1]])}, ValueError, "'counts' must be integer-valued"),
        ({"counts": np.array([[0.0, 0.0], [1, 1]])}, ValueError, r"sequences \[0\] have none"),
        ({"exact": 1}, TypeError, "'exact' must be a bool"),
        ({"missing_ids": np.array([1])}, ValueError, "'missing_ids' overlaps 'sequence_ids'"),
        ({"n_qubits": 4}, ValueError, "'n_qubits' must be 1, 2 or 3"),
    ],
)
def test_counts_rejects_bad_values(kwargs, exc, match):
    base = {"n_qubits": 1, "plan_fingerprint": FP, "sequence_ids": np.array([0, 1]),
            "counts": np.array([[3.0, 1.0], [2.0, 2.0]]), "exact": False, "source": "test"}
    with pytest.raises(exc, match=match):
        Counts(**{**base, **kwargs})


def test_counts_copies_and_freezes_arrays():
    raw = np.array([[3.0, 1.0]])
    c = Counts(n_qubits=1, plan_fingerprint=FP, sequence_ids=np.array([4]), counts=raw, exact=False, source="t")
    raw[0, 0] = 99
    assert c.counts[0, 0] == 3.0
    with pytest.raises(ValueError):
        c.counts[0, 0] = 1.0
    assert c.shots.tolist() == [4.0] and c.n_sequences == 1 and c.missing_ids.size == 0


def test_for_block_aligns_rows_with_block_sequences():
    plan, counts = small_plan(), small_counts()
    for b, block in enumerate(plan.blocks):
        rows = counts.for_block(plan, b)
        k = np.asarray(block.cliffords).shape[0]
        pos = np.searchsorted(counts.sequence_ids, block.first_id + np.arange(k))
        assert np.array_equal(rows, counts.counts[pos])
        assert np.array_equal(counts.for_block(plan, block), rows)
    partial = Counts(n_qubits=2, plan_fingerprint=plan.fingerprint, sequence_ids=counts.sequence_ids[1:],
                     counts=counts.counts[1:], exact=False, source="partial", missing_ids=counts.sequence_ids[:1])
    with pytest.raises(DataError, match=r"no data for 1 sequence\(s\) of this block, e.g. ids \[0\]"):
        partial.for_block(plan, 0)
    with pytest.raises(DataError, match="belong to plan"):
        counts.for_block(small_plan(seed=5), 0)
    with pytest.raises(ValueError, match="'block' index must be in"):
        counts.for_block(plan, 7)


# ---- HDF5 ----------------------------------------------------------------------------------
@pytest.mark.parametrize("exact", [False, True])
def test_hdf5_round_trip(tmp_path, exact):
    plan = small_plan()
    src = simulate(plan, Device.build(2, error=channels.depolarizing(2, 0.9)), seed=2, exact=exact)
    path = tmp_path / "counts.h5"
    save_counts(src, path)
    back = load_counts(path)
    assert back.fingerprint == src.fingerprint and back.exact == exact and back.source == src.source
    assert np.array_equal(back.counts, src.counts) and np.array_equal(back.sequence_ids, src.sequence_ids)
    with h5py.File(path, "r") as f:
        text = {k: f.attrs[k].decode() for k in ("kind", "plan_fingerprint", "fingerprint", "bit_order")}
        assert f.attrs["schema_version"] == 1 and text["kind"] == "robusttomo-counts"
        assert text["plan_fingerprint"] == plan.fingerprint and text["fingerprint"] == src.fingerprint
        assert "most significant" in text["bit_order"] and "package_version" in f.attrs


def test_hdf5_never_overwrites_unless_forced(tmp_path):
    path = tmp_path / "counts.h5"
    path.write_bytes(b"keep me")
    with pytest.raises(FileExistsError, match="output exists"):
        save_counts(small_counts(), path)
    assert path.read_bytes() == b"keep me"
    save_counts(small_counts(), path, force=True)
    assert load_counts(path).fingerprint == small_counts().fingerprint
    assert sorted(p.name for p in tmp_path.iterdir()) == ["counts.h5"]  # no temporary left behind


def _edit(path, fn):
    with h5py.File(path, "r+") as f:
        fn(f)


@pytest.mark.parametrize(
    ("edit", "match"),
    [
        (lambda f: f.attrs.__setitem__("schema_version", 2), "schema_version 2"),
        (lambda f: f.attrs.__delitem__("schema_version"), "attribute 'schema_version' is missing"),
        (lambda f: f.attrs.__setitem__("kind", np.bytes_(b"robusttomo-plan")), "attribute 'kind' is 'robusttomo-plan'"),
        (lambda f: f.attrs.__setitem__("kind", "robusttomo-counts"), "attribute 'kind' has an unsupported type"),
        (lambda f: f.attrs.__setitem__("source", np.bytes_(b"\xff\xfe")), "attribute 'source' is not UTF-8 text"),
        (lambda f: f.attrs.__setitem__("n_qubits", 5), "attribute 'n_qubits' must be 1, 2 or 3"),
        (lambda f: f.attrs.__delitem__("exact"), "attribute 'exact' is missing or not a boolean"),
        (lambda f: f["counts"].__setitem__((0, 0), f["counts"][0, 0] + 1), "content does not match attribute 'fingerprint'"),
        (lambda f: f["counts"].__setitem__((0, 0), -1.0), "dataset 'counts' holds negative values"),
        (lambda f: f["counts"].__setitem__((0, 0), 0.5), "dataset 'counts' holds fractional values"),
        (lambda f: f["counts"].__setitem__((0, 0), np.nan), "dataset 'counts' holds NaN"),
        (lambda f: f["counts"].__setitem__((0, 0), 1e13), "dataset 'counts' holds values above 1e\\+12"),
        (lambda f: f["counts"].__setitem__(0, np.zeros(4)), r"sequence \(row 0\) with zero shots"),
        (lambda f: f.__delitem__("sequence_ids"), "dataset 'sequence_ids' is missing"),
        (lambda f: (f.__delitem__("counts"), f.create_dataset("counts", data=np.ones((2, 4)))),
         r"dataset 'counts' must have shape \(len\(sequence_ids\), 4\)"),
        (lambda f: (f.__delitem__("counts"), f.create_dataset("counts", data=np.array([b"a"] * 3))),
         "dataset 'counts' must be numeric"),
    ],
)
def test_load_counts_rejects_bad_files(tmp_path, edit, match):
    path = tmp_path / "counts.h5"
    save_counts(small_counts(), path)
    _edit(path, edit)
    with pytest.raises(DataError, match=match) as info:
        load_counts(path)
    assert str(path) in str(info.value)


def test_load_counts_rejects_non_hdf5_and_missing(tmp_path):
    path = tmp_path / "counts.h5"
    path.write_text("sequence_id,bitstring,count\n")
    with pytest.raises(DataError, match="not a readable HDF5 counts file"):
        load_counts(path)
    with pytest.raises(DataError, match="no such counts file"):
        load_counts(tmp_path / "missing.h5")


@functools.lru_cache(maxsize=None)
def _good_h5_bytes(tmp_dir):
    from pathlib import Path

    path = Path(tmp_dir) / "seed-counts.h5"
    if not path.exists():
        save_counts(small_counts(), path)
    return path.read_bytes()


@FUZZ
@given(data=st.data())
def test_hdf5_readers_never_crash_on_mutated_files(tmp_path_factory, data):
    good = _good_h5_bytes(str(tmp_path_factory.getbasetemp()))
    raw = bytearray(good)
    kind = data.draw(st.sampled_from(["flip", "truncate", "random"]))
    if kind == "flip":
        for _ in range(data.draw(st.integers(1, 8))):
            raw[data.draw(st.integers(0, len(raw) - 1))] = data.draw(st.integers(0, 255))
    elif kind == "truncate":
        raw = raw[: data.draw(st.integers(0, len(raw) - 1))]
    else:
        raw = bytearray(data.draw(st.binary(max_size=600)))
    path = tmp_path_factory.mktemp("h5") / "fuzz.h5"
    path.write_bytes(bytes(raw))
    for reader in (load_counts, lambda p: ingest(small_plan(), p)):
        try:
            out = reader(path)
        except DataError:
            continue
        assert isinstance(out, Counts)


# ---- ingest: CSV ---------------------------------------------------------------------------
@pytest.mark.parametrize("order", ["q0-left", "q0-right"])
def test_ingest_csv_reproduces_counts(tmp_path, order):
    plan, counts = small_plan(), small_counts()
    path = tmp_path / "results.csv"
    path.write_text(csv_text(counts, order))
    got = ingest(plan, path, bit_order=order)
    assert np.array_equal(got.counts, counts.counts) and np.array_equal(got.sequence_ids, counts.sequence_ids)
    assert got.plan_fingerprint == plan.fingerprint and not got.exact and got.missing_ids.size == 0
    assert "results.csv" in got.source and order in got.source


def test_ingest_bit_order_reverses_qubits(tmp_path):
    # "10" read q0-left is x = 2 (qubit 0 is 1); read q0-right it is x = 1 (qubit 1 is 1).
    plan = small_plan()
    ids = np.sort(np.asarray(plan.sequence_ids))
    text = "sequence_id,bitstring,count\n" + "".join(f"{i},10,5\n" for i in ids)
    path = tmp_path / "r.csv"
    path.write_text(text)
    assert ingest(plan, path).counts[0].tolist() == [0, 0, 5, 0]
    assert ingest(plan, path, bit_order="q0-right").counts[0].tolist() == [0, 5, 0, 0]


def test_ingest_csv_columns_in_any_order_and_blank_lines(tmp_path):
    plan, counts = small_plan(), small_counts()
    lines = csv_text(counts).splitlines()
    swapped = ["count,sequence_id,bitstring"] + [",".join([r.split(",")[2], *r.split(",")[:2]]) for r in lines[1:]]
    path = tmp_path / "r.csv"
    path.write_text("\n" + "\n\n".join(swapped) + "\n")
    assert ingest(plan, path).fingerprint == ingest_text(tmp_path, csv_text(counts)).fingerprint


def ingest_text(tmp_path, text, suffix=".csv", **kw):
    path = tmp_path / f"in{suffix}"
    path.write_text(text)
    return ingest(small_plan(), path, **kw)


def test_ingest_allow_missing_reports_missing(tmp_path):
    counts = small_counts()
    text = "\n".join(line for line in csv_text(counts).splitlines() if not line.startswith(("0,", "4,")))
    with pytest.raises(DataError, match=r"2 plan sequence\(s\) have no data, e.g. ids \[0, 4\]; pass --allow-missing \(in Python allow_missing"):
        ingest_text(tmp_path, text)
    got = ingest_text(tmp_path, text, allow_missing=True)
    assert got.missing_ids.tolist() == [0, 4] and "2 sequence(s) missing" in got.source
    assert got.sequence_ids.tolist() == [1, 2, 3, 5]


def _ids_text(rows):
    return "sequence_id,bitstring,count\n" + "\n".join(rows) + "\n"


_FULL = [f"{i},00,10" for i in range(6)]


@pytest.mark.parametrize(
    ("rows", "match"),
    [
        (_FULL + ["99,00,1"], r"row 8: field 'sequence_id': unknown sequence id 99 \(the plan has ids 0..5\)"),
        (_FULL + ["-1,00,1"], r"row 8: field 'sequence_id' must be a non-negative integer; got '-1'"),
        (_FULL + ["x,00,1"], r"row 8: field 'sequence_id' must be a non-negative integer"),
        (_FULL + ["0,00,3"], r"row 8: duplicated entry for sequence 0, bitstring '00' \(first given at row 2\)"),
        (_FULL + ["1,010,3"], r"row 8: field 'bitstring' must be 2 characters 0/1 \(one per qubit\); got '010'"),
        (_FULL + ["1,0,3"], r"row 8: field 'bitstring' must be 2 characters"),
        (_FULL + ["1,0a,3"], r"row 8: field 'bitstring' must be 2 characters 0/1 .*got '0a'"),
        (_FULL + ["1,12,3"], r"row 8: field 'bitstring' must be 2 characters 0/1"),
        (_FULL + ["1,01,-3"], r"row 8: field 'count' must be a non-negative integer; got -3"),
        (_FULL + ["1,01,2.5"], r"row 8: field 'count' must be an integer number of shots; got 2.5"),
        (_FULL + ["1,01,nan"], r"row 8: field 'count' is NaN"),
        (_FULL + ["1,01,ten"], r"row 8: field 'count' must be a number; got 'ten'"),
        (_FULL + ["1,01,"], r"row 8: field 'count' must be a number; got ''"),
        (_FULL + ["1,01,1e13"], r"row 8: field 'count' is absurdly large \(above 1e\+12\)"),
        (_FULL + ["1,01,inf"], r"row 8: field 'count' is absurdly large"),
        (_FULL + ["1,01"], r"row 8: expected 3 fields \(sequence_id, bitstring, count\); got 2"),
        ([f"{i},00,10" for i in range(5)] + ["5,00,0", "5,11,0"], r"row 7: sequence 5 has zero shots in total"),
        (_FULL[:4], r"2 plan sequence\(s\) have no data, e.g. ids \[4, 5\]"),
    ],
)
def test_ingest_csv_rejects_bad_rows(tmp_path, rows, match):
    with pytest.raises(DataError, match=match) as info:
        ingest_text(tmp_path, _ids_text(rows))
    msg = str(info.value)
    assert msg.startswith(str(tmp_path / "in.csv")) and "\n" not in msg


@pytest.mark.parametrize(
    ("text", "match"),
    [
        ("", "empty file; expected a header row"),
        ("0,00,10\n", r"row 1 \(header\): columns must be exactly sequence_id, bitstring, count"),
        ("sequence_id,bitstring,count,extra\n", r"columns must be exactly"),
        ("sequence_id,bitstring,bitstring\n", r"columns must be exactly"),
        ("sequence_id,bitstring,count\n0,\"00\n", r"row 2: malformed CSV"),
        ("sequence_id,bitstring,count\n0,00,1\x00\n", "contains NUL bytes"),
    ],
)
def test_ingest_csv_rejects_bad_structure(tmp_path, text, match):
    with pytest.raises(DataError, match=match):
        ingest_text(tmp_path, text)


def test_ingest_rejects_bad_files_and_options(tmp_path):
    path = tmp_path / "r.csv"
    path.write_bytes(b"sequence_id,bitstring,count\n0,00,\xff\n")
    with pytest.raises(DataError, match="not UTF-8 text"):
        ingest(small_plan(), path)
    with pytest.raises(DataError, match="no such results file"):
        ingest(small_plan(), tmp_path / "absent.csv")
    with pytest.raises(DataError, match="unknown results format '.txt'"):
        ingest(small_plan(), tmp_path / "r.txt")
    with pytest.raises(ValueError, match="'bit_order' must be one of"):
        ingest(small_plan(), path, bit_order="little")
    with pytest.raises(TypeError, match="'allow_missing' must be a bool"):
        ingest(small_plan(), path, allow_missing="yes")
    with pytest.raises(TypeError, match="'plan' must be a robusttomo Plan"):
        ingest("plan.h5", path)


_csv_cells = st.one_of(st.integers(-5, 10).map(str), st.sampled_from(["00", "01", "10", "11", "1", "0x", "", "nan",
                                                                      "1e20", "2.5", " 3 ", '"', "\r"]),
                       st.text(max_size=5))


@FUZZ
@given(rows=st.lists(st.lists(_csv_cells, min_size=0, max_size=4), max_size=10), header=st.booleans())
def test_ingest_csv_never_crashes_on_random_rows(tmp_path, rows, header):
    text = ("sequence_id,bitstring,count\n" if header else "") + "\n".join(",".join(r) for r in rows)
    try:
        got = ingest_text(tmp_path, text, allow_missing=True)
    except DataError:
        return
    assert isinstance(got, Counts) and np.all(got.shots > 0)


def _mutate(data, raw: bytearray) -> bytes:
    for _ in range(data.draw(st.integers(1, 5))):
        if not raw:
            break
        pos = data.draw(st.integers(0, len(raw) - 1))
        op = data.draw(st.sampled_from(["set", "delete", "insert", "duplicate_line"]))
        if op == "set":
            raw[pos] = data.draw(st.integers(0, 255))
        elif op == "delete":
            del raw[pos]
        elif op == "insert":
            raw.insert(pos, data.draw(st.sampled_from(b"0123456789,.-e\n\"{}[]:na")))
        else:
            lines = bytes(raw).split(b"\n")
            i = data.draw(st.integers(0, len(lines) - 1))
            raw = bytearray(b"\n".join(lines[: i + 1] + lines[i:]))
    return bytes(raw)


@FUZZ
@given(data=st.data(), suffix=st.sampled_from([".csv", ".json"]), allow=st.booleans())
def test_ingest_never_crashes_on_mutated_files(tmp_path, data, suffix, allow):
    plan, counts = small_plan(), small_counts()
    good = csv_text(counts) if suffix == ".csv" else json.dumps(json_doc(counts, plan))
    path = tmp_path / f"mut{suffix}"
    path.write_bytes(_mutate(data, bytearray(good.encode())))
    try:
        got = ingest(plan, path, allow_missing=allow)
    except DataError:
        return
    assert isinstance(got, Counts) and got.plan_fingerprint == plan.fingerprint


# ---- ingest: JSON --------------------------------------------------------------------------
@pytest.mark.parametrize("order", ["q0-left", "q0-right"])
def test_ingest_json_reproduces_counts(tmp_path, order):
    plan, counts = small_plan(), small_counts()
    got = ingest_text(tmp_path, json.dumps(json_doc(counts, plan, order)), ".json", bit_order=order)
    assert np.array_equal(got.counts, counts.counts) and got.plan_fingerprint == plan.fingerprint
    doc = json_doc(counts, plan, order)
    del doc["bit_order"]  # without the field, the option decides
    assert np.array_equal(ingest_text(tmp_path, json.dumps(doc), ".json", bit_order=order).counts, counts.counts)


def _json_case(change):
    def build():
        doc = json_doc(small_counts(), small_plan())
        change(doc)
        return json.dumps(doc)
    return build


def _set(key, value):
    return lambda doc: doc.__setitem__(key, value)


@pytest.mark.parametrize(
    ("make", "match"),
    [
        (_json_case(_set("schema_version", 7)), "schema_version 7"),
        (_json_case(_set("schema_version", True)), "field 'schema_version' is missing or not an integer"),
        (_json_case(lambda d: d.pop("schema_version")), "field 'schema_version' is missing"),
        (_json_case(_set("plan_fingerprint", "0" * 64)), "field 'plan_fingerprint' is '000000000000'...,"
                                                         " but the plan's fingerprint"),
        (_json_case(lambda d: d.pop("plan_fingerprint")), "field 'plan_fingerprint' is missing"),
        (_json_case(_set("bit_order", "q0-right")), "field 'bit_order' is 'q0-right' but bit_order='q0-left'"),
        (_json_case(_set("bit_order", "msb")), "field 'bit_order' must be one of"),
        (_json_case(_set("kind", "robusttomo-plan")), "field 'kind' must be 'robusttomo-counts'"),
        (_json_case(_set("shots", 100)), "unknown field 'shots'"),
        (_json_case(_set("counts", [])), "field 'counts' is missing or not an object"),
        (_json_case(lambda d: d["counts"].__setitem__("17", {"00": 1})), r"counts\['17'\]: field 'sequence_id': unknown sequence id 17"),
        (_json_case(lambda d: d["counts"].__setitem__("00", {"00": 1})), r"counts\['00'\]: duplicated sequence id 0"),
        (_json_case(lambda d: d["counts"].__setitem__("0", [1, 2])), r"counts\['0'\]: must be an object"),
        (_json_case(lambda d: d["counts"].__setitem__("0", {})), r"counts\['0'\]: sequence 0 has zero shots"),
        (_json_case(lambda d: d["counts"].__setitem__("0", {"00": 0})), r"sequence 0 has zero shots"),
        (_json_case(lambda d: d["counts"]["0"].__setitem__("2", 1)), r"counts\['0'\]\['2'\]: field 'bitstring' must be 2"),
        (_json_case(lambda d: d["counts"]["0"].__setitem__("01", -1)), r"counts\['0'\]\['01'\]: field 'count' must be a non-negative"),
        (_json_case(lambda d: d["counts"]["0"].__setitem__("01", 1.5)), r"field 'count' must be an integer number of shots"),
        (_json_case(lambda d: d["counts"]["0"].__setitem__("01", True)), r"field 'count' must be a number; got bool"),
        (_json_case(lambda d: d["counts"]["0"].__setitem__("01", "12")), r"field 'count' must be a JSON number, not a string; got '12'"),
        (_json_case(lambda d: d["counts"]["0"].__setitem__("01", None)), r"field 'count' must be a number; got NoneType"),
        (_json_case(lambda d: d["counts"]["0"].__setitem__("01", 10**30)), r"field 'count' is absurdly large"),
        (_json_case(lambda d: d["counts"]["0"].__setitem__("01", float("nan"))), r"field 'count' is NaN"),
        (_json_case(lambda d: d["counts"].pop("3")), r"1 plan sequence\(s\) have no data, e.g. ids \[3\]"),
        (lambda: '{"schema_version": 1, "schema_version": 1}', "duplicated JSON key 'schema_version'"),
        (lambda: "[]", "top level must be a JSON object"),
        (lambda: "{", "not valid JSON"),
        (lambda: "[" * 100000, "not valid JSON"),
    ],
)
def test_ingest_json_rejects_bad_documents(tmp_path, make, match):
    with pytest.raises(DataError, match=match) as info:
        ingest_text(tmp_path, make(), ".json")
    assert str(tmp_path / "in.json") in str(info.value) and "\n" not in str(info.value)


def test_ingest_json_duplicate_bitstring_key(tmp_path):
    plan = small_plan()
    body = ", ".join(f'"{i}": {{"00": 5}}' for i in range(1, 6))
    text = (f'{{"schema_version": 1, "plan_fingerprint": "{plan.fingerprint}", '
            f'"counts": {{"0": {{"01": 3, "01": 4}}, {body}}}}}')
    with pytest.raises(DataError, match="duplicated JSON key '01'"):
        ingest_text(tmp_path, text, ".json")


_json_values = st.recursive(
    st.one_of(st.none(), st.booleans(), st.integers(-2, 2**40), st.floats(), st.sampled_from(["00", "11", "0", "01"])),
    lambda kids: st.lists(kids, max_size=3) | st.dictionaries(st.sampled_from(["0", "1", "5", "00", "01", "10", "x"]),
                                                              kids, max_size=4),
    max_leaves=25)


@FUZZ
@given(counts=_json_values, extra=st.dictionaries(st.sampled_from(["schema_version", "bit_order", "kind", "metadata"]),
                                                  _json_values, max_size=2))
def test_ingest_json_never_crashes_on_random_documents(tmp_path, counts, extra):
    doc = {"schema_version": 1, "plan_fingerprint": small_plan().fingerprint, "counts": counts, **extra}
    try:
        got = ingest_text(tmp_path, json.dumps(doc), ".json", allow_missing=True)
    except DataError:
        return
    assert isinstance(got, Counts) and np.all(got.shots > 0)


# ---- ingest: HDF5 --------------------------------------------------------------------------
def test_ingest_hdf5_checks_the_plan(tmp_path):
    plan, counts = small_plan(), small_counts()
    path = tmp_path / "c.h5"
    save_counts(counts, path)
    assert ingest(plan, path).fingerprint == counts.fingerprint
    with pytest.raises(DataError, match="attribute 'plan_fingerprint' is .* these counts belong to another plan"):
        ingest(small_plan(seed=9), path)
    partial = Counts(n_qubits=2, plan_fingerprint=plan.fingerprint, sequence_ids=counts.sequence_ids[2:],
                     counts=counts.counts[2:], exact=False, source="partial")
    path2 = tmp_path / "p.h5"
    save_counts(partial, path2)
    with pytest.raises(DataError, match=r"2 plan sequence\(s\) have no data"):
        ingest(plan, path2)
    assert ingest(plan, path2, allow_missing=True).missing_ids.tolist() == [0, 1]


def test_docstring_examples_run():
    import doctest
    import importlib

    mod = importlib.import_module("robusttomo.counts")

    result = doctest.testmod(mod)
    assert result.attempted >= 2 and result.failed == 0
