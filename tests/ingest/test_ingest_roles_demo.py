"""suggest_roles on the demo tables, and the demo designs themselves."""

import csv
import io
import itertools

import numpy as np
import pytest
from numpy.testing import assert_allclose

from app import demo_data
from app.ingest import ColumnRole, read_upload, suggest_roles, validate


def without_units(roles):
    return {name: ColumnRole(r.role, low=r.low, high=r.high, kind=r.kind)
            for name, r in roles.items()}


@pytest.mark.parametrize("study", demo_data.demo_studies(), ids=lambda s: s.key)
def test_suggested_roles_match_the_demo_roles(study):
    raw = read_upload(study.csv_bytes, study.filename)
    # The headers carry no units, so only units differ from the demo's declared roles.
    assert suggest_roles(raw) == without_units(study.roles)
    validate(raw, study.roles)


def test_ccd_levels_suggested_are_the_cube_levels_not_the_axial_ones():
    study = demo_data.rsm_study()
    suggested = suggest_roles(read_upload(study.csv_bytes, study.filename))
    assert (suggested["Cure temperature"].low, suggested["Cure temperature"].high) == (150, 170)
    assert (suggested["Cure time"].low, suggested["Cure time"].high) == (20, 30)
    assert (suggested["Catalyst"].low, suggested["Catalyst"].high) == (0.8, 1.2)


def test_suggest_roles_rules():
    text = ("Std order,Run,Block,Sample ID,Operator,A (bar),B,Y [%]\n"
            + "".join(f"{i},{9 - i},{1 + i // 4},s{i},{'ab'[i % 2]},{(-1) ** i * 2 + 5},"
                      f"{(-1) ** (i // 2)},{i * 1.37:.2f}\n" for i in range(1, 9)))
    roles = suggest_roles(read_upload(text.encode(), "r.csv"))
    assert roles == {
        "Std order": ColumnRole("ignore"),   # standard order is not the order runs were made
        "Run": ColumnRole("run_order"),
        "Block": ColumnRole("block"),
        "Sample ID": ColumnRole("label"),
        "Operator": ColumnRole("covariate", kind="categorical"),
        "A (bar)": ColumnRole("factor", units="bar", low=3.0, high=7.0),
        "B": ColumnRole("factor", low=-1.0, high=1.0),
        "Y [%]": ColumnRole("response", units="%"),
    }


def test_three_level_factor_uses_the_extremes():
    text = "A,Y\n" + "".join(f"{v},{i}\n" for i, v in enumerate([10, 20, 30, 10, 20, 30, 20]))
    assert suggest_roles(read_upload(text.encode(), "r.csv"))["A"].low == 10.0


def test_constant_and_empty_columns_are_suggested_ignore():
    text = "A,C,E,Y\n1,5,,1\n2,5,,2\n1,5,,3\n2,5,x,4\n"
    roles = suggest_roles(read_upload(text.encode(), "r.csv"))
    assert roles["C"].role == "ignore" and roles["E"].role == "ignore"


def test_rsm_design_is_a_rotatable_central_composite():
    x = demo_data.rsm_coded_design()
    assert x.shape == (20, 3)
    is_cube = np.all(np.abs(x) == 1, axis=1)
    is_centre = np.all(x == 0, axis=1)
    is_axial = (np.count_nonzero(x, axis=1) == 1)
    assert (is_cube.sum(), is_axial.sum(), is_centre.sum()) == (8, 6, 6)
    assert_allclose(np.abs(x[is_axial]).max(axis=1), 1.682, rtol=0, atol=0)
    # Rotatable when alpha = (number of cube points) ** (1/4) (Box & Hunter 1957, recalled from
    # memory); 8 ** 0.25 = 1.6818, which the design writes to three decimals.
    assert_allclose(8 ** 0.25, demo_data.CCD_ALPHA, rtol=0, atol=5e-4)
    assert {tuple(r) for r in x[is_cube]} == set(itertools.product((-1.0, 1.0), repeat=3))


def test_rsm_csv_recodes_to_the_design_with_a_random_run_order():
    study = demo_data.rsm_study()
    table = validate(read_upload(study.csv_bytes, study.filename), study.roles)
    coded = np.column_stack([
        (table.frame[name] - (r.low + r.high) / 2) / ((r.high - r.low) / 2)
        for name, r in study.roles.items() if r.role == "factor"])
    expected = demo_data.rsm_coded_design()
    assert sorted(map(tuple, np.round(coded, 6))) == sorted(map(tuple, np.round(expected, 6)))
    assert sorted(table.frame["Run order"]) == list(range(1, 21))
    assert table.frame["Run order"].tolist() == list(range(1, 21))  # rows are in run order
    assert table.responses == ("Hardness", "Gloss")


def test_screening_design_is_a_resolution_v_half_fraction():
    x = demo_data.screening_coded_design()
    assert x.shape == (16, 5)
    assert_allclose(x[:, 4], x[:, :4].prod(axis=1), rtol=0, atol=0)      # E = ABCD
    assert len({tuple(r) for r in x}) == 16
    # Resolution V: every main effect and two-factor interaction column is orthogonal to
    # every other one (no aliasing among them).
    columns = [x[:, i] for i in range(5)] + [x[:, i] * x[:, j]
                                             for i, j in itertools.combinations(range(5), 2)]
    gram = np.array(columns) @ np.array(columns).T
    assert_allclose(gram, 16 * np.eye(15), rtol=0, atol=0)


def test_screening_csv_has_run_order_and_a_numeric_covariate():
    study = demo_data.screening_study()
    table = validate(read_upload(study.csv_bytes, study.filename), study.roles)
    assert table.n_runs == 16 and len(table.factors) == 5
    assert table.covariates == ("Ambient humidity",)
    assert table.roles["Ambient humidity"].kind == "numeric"
    assert table.frame["Ambient humidity"].nunique() > 10
    assert table.responses == ("Film thickness",)
    assert sorted(table.frame["Run order"]) == list(range(1, 17))


def test_demo_generation_is_deterministic_and_matches_the_shipped_files():
    for study in demo_data.demo_studies():
        again = {s.key: s for s in demo_data.demo_studies()}[study.key]
        assert again.csv_bytes == study.csv_bytes
        assert (demo_data.DEMO_DIR / study.filename).read_bytes() == study.csv_bytes


def test_write_demo_files(tmp_path):
    paths = demo_data.write_demo_files(tmp_path)
    assert [p.name for p in paths] == ["rsm_demo.csv", "screening_demo.csv"]
    rows = list(csv.reader(io.StringIO(paths[0].read_text(encoding="utf-8"))))
    assert len(rows) == 21


def test_demo_scenario_descriptions_are_filled():
    for study in demo_data.demo_studies():
        assert study.title and study.purpose and study.process
        assert demo_data.PLANT in study.process
    assert {roles for _, _, roles in demo_data.DEMO_PEOPLE} == {
        ("engineer",), ("approver",), ("auditor",)}
