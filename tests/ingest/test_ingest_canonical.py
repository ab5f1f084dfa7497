"""Canonical CSV and roles JSON reload to exactly the same design table."""

import json
import math

import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from app.demo_data import demo_studies
from app.ingest import ColumnRole, DesignTable, IngestError, load_canonical, read_upload, validate


def assert_same_table(loaded: DesignTable, original: DesignTable):
    pd.testing.assert_frame_equal(loaded.frame, original.frame, check_exact=True)
    assert loaded.frame.index.name == "row"
    assert loaded == original
    assert loaded.to_canonical_csv() == original.to_canonical_csv()
    assert loaded.roles_json() == original.roles_json()


@pytest.mark.parametrize("study", demo_studies(), ids=lambda s: s.key)
def test_demo_tables_round_trip_exactly(study):
    table = validate(read_upload(study.csv_bytes, study.filename), study.roles)
    assert_same_table(load_canonical(table.to_canonical_csv(), table.roles_json()), table)


def test_canonical_csv_layout_is_fixed():
    raw = read_upload("Run;T;Y;Lot;Note\n2;150;0,1;A;x, \"y\"\n1;170;2;B;\n3;150;3;A;z\n"
                      .encode("latin-1"), "r.csv")
    roles = {"Run": ColumnRole("run_order"), "T": ColumnRole("factor", low=150.0, high=170.0),
             "Y": ColumnRole("response", units="g/L"),
             "Lot": ColumnRole("covariate", kind="categorical"), "Note": ColumnRole("label")}
    table = validate(raw, roles)
    assert table.to_canonical_csv() == (
        b'row,Run,T,Y,Lot,Note\n'
        b'1,2,150.0,0.1,A,"x, ""y"""\n'
        b'2,1,170.0,2.0,B,\n'
        b'3,3,150.0,3.0,A,z\n')
    assert json.loads(table.roles_json())["Y"] == {
        "role": "response", "units": "g/L", "low": None, "high": None, "kind": None}
    assert list(json.loads(table.roles_json())) == sorted(roles)


def test_floats_survive_bit_for_bit():
    values = ["0.1", "1e-300", "-0.0", "123456789.123456789", "2.2250738585072014e-308",
              "1.7976931348623157e308"]
    text = "A,Y\n" + "".join(f"{(-1) ** i},{v}\n" for i, v in enumerate(values))
    table = validate(read_upload(text.encode(), "f.csv"),
                     {"A": ColumnRole("factor"), "Y": ColumnRole("response")})
    loaded = load_canonical(table.to_canonical_csv(), table.roles_json())
    for a, b in zip(loaded.frame["Y"], table.frame["Y"], strict=True):
        assert math.copysign(1, a) == math.copysign(1, b) and a.hex() == b.hex()


cell_text = st.text(st.characters(exclude_categories=("Cs", "Cc")), min_size=1, max_size=12)


@settings(max_examples=60, deadline=None)
@given(
    ys=st.lists(st.floats(allow_nan=False, allow_infinity=False, width=64), min_size=4,
                max_size=12),
    labels=st.lists(st.one_of(st.none(), cell_text), min_size=12, max_size=12),
    lots=st.lists(cell_text, min_size=12, max_size=12),
)
def test_round_trip_is_exact_for_arbitrary_values(ys, labels, lots):
    n = len(ys)
    frame = pd.DataFrame({
        "A": pd.Series([float((-1) ** i) for i in range(n)], dtype="float64"),
        "Y": pd.Series(ys, dtype="float64"),
        "Lot": pd.Series([s.strip() or "x" for s in lots[:n]], dtype=object),
        "Label": pd.Series([None if s is None or not s.strip() else s.strip()
                            for s in labels[:n]], dtype=object),
        "Run": pd.Series(range(1, n + 1), dtype="int64"),
    })
    frame.index = pd.RangeIndex(1, n + 1, name="row")
    roles = {"A": ColumnRole("factor"), "Y": ColumnRole("response"),
             "Lot": ColumnRole("covariate", kind="categorical"), "Label": ColumnRole("label"),
             "Run": ColumnRole("run_order"), "Dropped": ColumnRole("ignore", units="x")}
    table = DesignTable(frame=frame, roles=roles, factors=("A",), responses=("Y",),
                        run_order="Run", covariates=("Lot",), label="Label")
    assert_same_table(load_canonical(table.to_canonical_csv(), table.roles_json()), table)


def test_tables_differing_in_one_value_are_not_equal():
    study = demo_studies()[0]
    table = validate(read_upload(study.csv_bytes, study.filename), study.roles)
    changed = table.to_canonical_csv().replace(b",106.5,", b",106.6,")
    assert changed != table.to_canonical_csv()
    assert load_canonical(changed, table.roles_json()) != table


def test_load_canonical_refuses_mismatched_roles():
    study = demo_studies()[0]
    table = validate(read_upload(study.csv_bytes, study.filename), study.roles)
    roles = json.loads(table.roles_json())
    roles["Gloss"]["role"] = "ignore"
    with pytest.raises(IngestError, match="do not match its roles"):
        load_canonical(table.to_canonical_csv(), json.dumps(roles))


def test_load_canonical_names_a_damaged_cell():
    study = demo_studies()[0]
    table = validate(read_upload(study.csv_bytes, study.filename), study.roles)
    damaged = table.to_canonical_csv().replace(b",106.5,", b",1o6.5,")
    with pytest.raises(IngestError) as excinfo:
        load_canonical(damaged, table.roles_json())
    (problem,) = excinfo.value.problems
    assert (problem.row, problem.column) == (1, "Hardness")


def test_column_role_dict_round_trip_and_bad_fields():
    role = ColumnRole("factor", units="°C", low=150.0, high=170.0)
    assert ColumnRole.from_dict(role.to_dict()) == role
    assert ColumnRole.from_dict({"role": "factor", "low": 1, "high": 2}).low == 1.0
    with pytest.raises(IngestError, match="'low' must be a number"):
        ColumnRole.from_dict({"role": "factor", "low": "150"})
    with pytest.raises(IngestError, match="unknown field"):
        ColumnRole.from_dict({"role": "factor", "colour": "red"})
