"""Why each role was suggested, in the words the upload preview shows."""

from app.ingest import read_upload


def test_the_reason_for_each_suggestion_names_the_cell_that_changed_it():
    """One bad cell changes what a column looks like; the preview says which cell and why."""
    from app.ingest import suggest_with_reasons

    text = ("Run,Temp,Time,Yield\n1,150,20,61.5\n2,170,20,64\n3,150 C,30,n/a\n4,170,30,70.9\n"
            "5,150,20,62\n6,170,,65\n")
    got = suggest_with_reasons(read_upload(text.encode(), "runs.csv"))
    role, why = got["Temp"]
    # a typing slip in a factor's column: still suggested as the factor, the slip named
    assert (role.role, role.kind, role.low, role.high) == ("factor", None, 150.0, 170.0)
    assert "'150 C' in row 3 is not a number; correct it" in why
    role, why = got["Time"]
    assert role.role == "response" and "1 blank cell" in why and "setting in every row" in why
    role, why = got["Yield"]
    assert role.role == "response" and "'n/a' in row 3 is not a number; correct it" in why
    assert got["Run"][1] == "the header names the run order"


def test_a_slip_in_a_factor_column_is_refused_at_storing_naming_the_cell():
    """Storing with the suggested roles refuses the slip by row and column; nothing quietly
    turns the factor into text."""
    import pytest

    from app.ingest import IngestError, suggest_roles, validate

    text = "".join(["A,B,Y\n"] + [f"{a},{b},{10 + i}\n" for i, (a, b) in enumerate(
        [(1, 5), (2, 5), (1, 6), (2, 6)] * 3)])
    text = text.replace("\n2,6,13\n", "\n2 x,6,13\n")
    raw = read_upload(text.encode(), "runs.csv")
    roles = suggest_roles(raw)
    assert roles["A"].role == "factor" and roles["A"].kind is None
    with pytest.raises(IngestError, match="Column 'A' .*row 4: '2 x' is not a number"):
        validate(raw, roles)


def test_a_column_mostly_of_text_stays_text():
    """More than one cell in five not numbers: a text column, as before."""
    from app.ingest import suggest_roles

    text = "Lot,Y\n1,5\nB2,6\nC3,7\n1,8\nB2,9\nC3,10\n"
    assert suggest_roles(read_upload(text.encode(), "runs.csv"))["Lot"].role != "factor"
