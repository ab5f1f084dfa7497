"""Factor columns whose names would make term names ambiguous are refused at upload, naming the
column (reference: DESIGN.md term names, interactions joined with ':' and squares as 'A^2')."""

import pytest

from app.ingest import ColumnRole, IngestError, read_upload, validate

F = ColumnRole("factor", low=150.0, high=170.0)
TABLE = ("Temp,{name},Yield\n"
         "150,1,61.5\n"
         "170,1,64.0\n"
         "150,2,66.2\n"
         "170,2,70.9\n")


@pytest.mark.parametrize(("name", "why"), [
    ("Temp:Time", "may not contain ':'"),
    ("Time^2", "may not contain '^'"),
    ("Intercept", "'Intercept' names the model's constant term"),
    ("intercept", "'Intercept' names the model's constant term"),
])
def test_ambiguous_factor_name_is_refused_naming_the_column(name, why):
    # before the fix these uploads were accepted and the fit then named two coefficients alike
    raw = read_upload(TABLE.format(name=name).encode(), "runs.csv")
    roles = {"Temp": F, name: ColumnRole("factor", low=1.0, high=2.0),
             "Yield": ColumnRole("response")}
    with pytest.raises(IngestError) as excinfo:
        validate(raw, roles)
    problems = excinfo.value.problems
    assert len(problems) == 1 and problems[0].column == name
    assert problems[0].message.startswith(f"Factor '{name}': ") and why in problems[0].message


def test_such_names_are_fine_outside_factors():
    raw = read_upload(TABLE.format(name="Yield:corrected").encode(), "runs.csv")
    roles = {"Temp": F, "Yield:corrected": ColumnRole("response"), "Yield": ColumnRole("response")}
    table = validate(raw, roles)
    assert table.responses == ("Yield:corrected", "Yield")
