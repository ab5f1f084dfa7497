"""Differences between two data versions' tables, checked against pandas' own DataFrame.compare
on the same edits (an independent route to the changed cells)."""

from __future__ import annotations

import io

import pandas as pd

from app.demo_data import rsm_study
from app.ingest import read_upload, validate
from app.ingest.diff import table_differences

DEMO = rsm_study()


def _table(text: str, roles=None):
    raw = read_upload(text.encode("utf-8"), "cure.csv")
    return validate(raw, roles or DEMO.roles)


def _frame() -> pd.DataFrame:
    return pd.read_csv(io.BytesIO(DEMO.csv_bytes))


def _csv(frame: pd.DataFrame) -> str:
    return frame.to_csv(index=False)


def test_same_table_has_no_differences():
    old = _table(_csv(_frame()))
    diff = table_differences(old, old)
    assert diff.none and diff.matched_by == "label"
    assert diff.counts()["cells_changed"] == 0


def test_changed_cells_added_and_removed_rows_matched_by_label():
    before = _frame()
    after = before.copy()
    after.loc[6, "Hardness"] = 126.0          # row 7 re-read
    after.loc[1, "Gloss"] = 80.0
    after = after.drop(index=[4])             # CV40-R05 removed
    extra = before.iloc[[0]].assign(**{"Panel ID": "CV40-R99", "Run order": 99})
    after = pd.concat([after, extra], ignore_index=True)
    diff = table_differences(_table(_csv(before)), _table(_csv(after)))

    assert diff.matched_by == "label" and diff.key_columns == ("Panel ID", "Panel ID")
    # pandas: the same edits seen through DataFrame.compare on the shared labels
    shared = before.set_index("Panel ID").loc[after["Panel ID"][after["Panel ID"]
                                                              .isin(before["Panel ID"])]]
    theirs = after.set_index("Panel ID").loc[shared.index]
    expected = shared.compare(theirs).stack(level=0, future_stack=True).dropna(how="all")
    found = {(c.key, c.column): (c.old, c.new) for c in diff.changed}
    assert found == {(label, column): (row["self"], row["other"])
                     for (label, column), row in expected.iterrows()}
    assert found[("CV40-R07", "Hardness")] == (125.1, 126.0)
    assert diff.added_rows == ({"key": "CV40-R99", "row": len(after)},)
    assert diff.removed_rows == ({"key": "CV40-R05", "row": 5},)
    assert diff.counts()["rows_changed"] == 2


def test_renamed_column_is_removed_plus_added_and_named_as_a_likely_rename():
    before = _frame()
    after = before.rename(columns={"Gloss": "Gloss 60°"})
    roles = {("Gloss 60°" if k == "Gloss" else k): v for k, v in DEMO.roles.items()}
    diff = table_differences(_table(_csv(before)), _table(_csv(after), roles))
    assert diff.columns_removed == ("Gloss",) and diff.columns_added == ("Gloss 60°",)
    assert diff.renamed == ({"old": "Gloss", "new": "Gloss 60°"},)
    assert not diff.changed


def test_role_change_is_listed_with_both_roles():
    before = _table(_csv(_frame()))
    roles = dict(DEMO.roles)
    roles["Gloss"] = type(roles["Gloss"])(role="covariate", kind="numeric")
    diff = table_differences(before, _table(_csv(_frame()), roles))
    assert [(r["column"], r["old"]["role"], r["new"]["role"]) for r in diff.roles_changed] == [
        ("Gloss", "response", "covariate")]


def test_a_column_read_as_text_in_one_version_changes_only_where_its_values_do():
    """A factor stored as a categorical covariate in the next version (a slip typed into it):
    the role change is listed, and only the cell whose value differs, not every cell that
    reads 160 in one version and 160.0 in the other."""
    before = _frame()
    after = before.astype({"Cure temperature": object})
    after.loc[6, "Cure temperature"] = "150 C"
    roles = dict(DEMO.roles)
    roles["Cure temperature"] = type(roles["Gloss"])(role="covariate", kind="categorical",
                                                     units="°C")
    diff = table_differences(_table(_csv(before)), _table(_csv(after), roles))
    assert [r["column"] for r in diff.roles_changed] == ["Cure temperature"]
    assert [(c.key, c.column, c.old, c.new) for c in diff.changed] == [
        ("CV40-R07", "Cure temperature", before.loc[6, "Cure temperature"], "150 C")]


def test_a_decimal_comma_file_read_as_text_in_one_version_compares_its_numbers():
    """The same change in a file written with ';' and decimal commas: text keeps '143,68',
    which is the number 143.68, so only the slipped cell changed."""
    def comma_file(frame):
        return frame.to_csv(index=False, sep=";", decimal=",")

    before = _frame()
    after = before.astype({"Cure temperature": object})
    after["Cure temperature"] = [f"{v:g}".replace(".", ",") for v in before["Cure temperature"]]
    after.loc[6, "Cure temperature"] = "150 C"
    roles = dict(DEMO.roles)
    roles["Cure temperature"] = type(roles["Gloss"])(role="covariate", kind="categorical",
                                                     units="°C")
    old = validate(read_upload(comma_file(before).encode(), "cure.csv"), DEMO.roles)
    new = validate(read_upload(comma_file(after).encode(), "cure.csv"), roles)
    assert any("," in str(v) for v in new.frame["Cure temperature"])  # the file's own writing
    diff = table_differences(old, new)
    assert [(c.key, c.column, c.new) for c in diff.changed] == [
        ("CV40-R07", "Cure temperature", "150 C")]


def test_without_label_rows_match_by_run_order_then_by_position():
    no_label = {k: v for k, v in DEMO.roles.items() if k != "Panel ID"}
    before = _frame().drop(columns=["Panel ID"])
    after = before.iloc[::-1].reset_index(drop=True)  # same runs, listed backwards
    diff = table_differences(_table(_csv(before), no_label), _table(_csv(after), no_label))
    assert diff.matched_by == "run_order" and diff.none

    neither = {k: v for k, v in no_label.items() if k != "Run order"}
    plain = before.drop(columns=["Run order"])
    edited = plain.copy()
    edited.loc[0, "Catalyst"] = 1.1
    diff = table_differences(_table(_csv(plain), neither), _table(_csv(edited), neither))
    assert diff.matched_by == "row"
    assert [(c.key, c.column, c.old, c.new) for c in diff.changed] == [(1, "Catalyst", 1.0, 1.1)]
