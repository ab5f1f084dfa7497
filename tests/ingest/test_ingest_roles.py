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
    """More than one cell in five not numbers: a text column (here a categorical factor, as
    any text column of few names used twice or more), not a factor read by its numbers."""
    from app.ingest import suggest_roles

    text = "Grade,Y\n1,5\nB2,6\nC3,7\n1,8\nB2,9\nC3,10\n"
    role = suggest_roles(read_upload(text.encode(), "runs.csv"))["Grade"]
    assert (role.role, role.kind) == ("factor", "categorical")


def test_one_number_and_a_slip_is_a_single_valued_column():
    from app.ingest import suggest_with_reasons

    text = "A,B,Y\n5,1,10\n5,2,11\n5,1,12\nn/a,2,13\n5,1,14\n"
    role, why = suggest_with_reasons(read_upload(text.encode(), "runs.csv"))["A"]
    assert role.role == "ignore" and why.startswith("one number in every filled row ('n/a'")


def test_carried_roles_keep_a_single_role_with_the_column_that_had_it():
    """Version 1 had 'Panel ID' as the run label; a new text column 'Sample' suggested as the
    label is offered as ignored instead, so storing with the offered roles works."""
    from app.ingest import ColumnRole, suggest_roles, validate, with_carried

    text = "".join(["Sample,Panel ID,A,Y\n"] + [f"s{i},P{i},{i % 2},{10 + i}\n"
                                                for i in range(8)])
    raw = read_upload(text.encode(), "runs.csv")
    suggested = suggest_roles(raw)
    assert suggested["Sample"].role == "label"  # the first text column with a value per row
    roles = with_carried(suggested, {"Panel ID": ColumnRole("label"),
                                     "A": ColumnRole("factor", low=0.0, high=1.0)})
    assert roles["Panel ID"].role == "label" and roles["Sample"].role == "ignore"
    assert validate(raw, roles).label == "Panel ID"
