"""Why each role was suggested, in the words the upload preview shows."""

from app.ingest import read_upload


def test_the_reason_for_each_suggestion_names_the_cell_that_changed_it():
    """One bad cell changes what a column looks like; the preview says which cell and why."""
    from app.ingest import suggest_with_reasons

    text = ("Run,Temp,Time,Yield\n1,150,20,61.5\n2,170,20,64\n3,150 C,30,n/a\n4,170,30,70.9\n"
            "5,150,20,62\n6,170,,65\n")
    got = suggest_with_reasons(read_upload(text.encode(), "runs.csv"))
    role, why = got["Temp"]
    assert role.kind == "categorical" and "'150 C' in row 3 is not a number" in why
    role, why = got["Time"]
    assert role.role == "response" and "1 blank cell" in why and "setting in every row" in why
    role, why = got["Yield"]
    assert role.role in ("label", "covariate") and "'n/a' in row 3 is not a number" in why
    assert got["Run"][1] == "the header names the run order"
