"""Whatever bytes arrive, reading and validating raise IngestError or succeed, nothing else."""

import io
import zipfile

import openpyxl
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from app.demo_data import rsm_csv, screening_csv
from app.ingest import ColumnRole, IngestError, load_canonical, read_upload, suggest_roles, validate

NAMES = st.sampled_from(["runs.csv", "runs.tsv", "runs.txt", "study.xlsx", "study.xls",
                         "runs.pdf", "runs"])
LIMITS = {"max_bytes": 200_000, "max_cells": 20_000, "max_xlsx_uncompressed": 5_000_000}
FUZZ = settings(max_examples=150, deadline=None,
                suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])


def ingest(data, filename, sheet=None):
    """Run the whole pure pipeline; return how far it got."""
    try:
        raw = read_upload(data, filename, sheet, **LIMITS)
    except IngestError as err:
        assert err.problems and all(p.message for p in err.problems)
        return "rejected at read"
    for roles in (suggest_roles(raw), first_factor_last_response(raw)):
        try:
            table = validate(raw, roles)
        except IngestError as err:
            assert err.problems
            continue
        reloaded = load_canonical(table.to_canonical_csv(), table.roles_json())
        assert reloaded == table
    return "read"


def first_factor_last_response(raw):
    columns = list(raw.frame.columns)
    roles = {c: ColumnRole("label") if i == 1 else ColumnRole("ignore")
             for i, c in enumerate(columns)}
    roles[columns[0]] = ColumnRole("factor")
    roles[columns[-1]] = ColumnRole("response")
    return roles


def workbook(rows):
    book = openpyxl.Workbook()
    book.active.title = "Runs"
    for row in rows:
        book.active.append(row)
    buffer = io.BytesIO()
    book.save(buffer)
    return buffer.getvalue()


XLSX = workbook([["Run", "Temp", "Yield"], [1, 150, 1.5], [2, 170, 2.5], [3, 150, 3.5],
                 [4, 170, "n/a"]])
SHEET_XML = zipfile.ZipFile(io.BytesIO(XLSX)).read("xl/worksheets/sheet1.xml")


def with_sheet_xml(xml):
    source = zipfile.ZipFile(io.BytesIO(XLSX))
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w", zipfile.ZIP_DEFLATED) as target:
        for info in source.infolist():
            name = info.filename
            target.writestr(name, xml if name == "xl/worksheets/sheet1.xml" else source.read(name))
    return buffer.getvalue()


def mutate(data, edits):
    """Apply (position, kind, byte) edits: replace, insert or delete one byte."""
    out = bytearray(data)
    for position, kind, value in edits:
        if not out:
            break
        i = position % len(out)
        if kind == 0:
            out[i] = value
        elif kind == 1:
            out.insert(i, value)
        else:
            del out[i]
    return bytes(out)


EDIT = st.tuples(st.integers(0, 10**6), st.integers(0, 2), st.integers(0, 255))
EDITS = st.lists(EDIT, min_size=1, max_size=8)


@FUZZ
@given(data=st.binary(max_size=2_000), filename=NAMES)
def test_random_bytes(data, filename):
    ingest(data, filename)


@FUZZ
@given(seed=st.sampled_from([rsm_csv(), screening_csv()]), edits=EDITS,
       delimiter=st.sampled_from([b",", b";", b"\t"]),
       encoding=st.sampled_from(["utf-8", "latin-1"]))
def test_mangled_csv(seed, edits, delimiter, encoding):
    text = seed.decode("utf-8").encode(encoding, errors="replace").replace(b",", delimiter)
    ingest(mutate(text, edits), "runs.csv")


@FUZZ
@given(text=st.text(st.sampled_from(list("ab1,;\t\n\r\". -e5°")), max_size=300))
def test_csv_like_text(text):
    ingest(text.encode("utf-8"), "runs.csv")


@FUZZ
@given(edits=st.lists(EDIT, max_size=4),
       truncate=st.one_of(st.none(), st.integers(1, len(XLSX))),
       sheet=st.sampled_from([None, "Runs", "x"]))
def test_mangled_xlsx_bytes(edits, truncate, sheet):
    ingest(mutate(XLSX, edits)[:truncate], "study.xlsx", sheet)


CELL = st.one_of(
    st.none(), st.integers(-10**20, 10**20), st.booleans(), st.dates(),
    st.floats(allow_nan=False, allow_infinity=False),
    st.text(st.characters(exclude_categories=("Cs", "Cc")), max_size=8),
    st.sampled_from(["=A1+1", "#DIV/0!", "1,5", " 2 ", "Temp", "Temp "]),
)


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(rows=st.lists(st.lists(CELL, min_size=1, max_size=5), max_size=8))
def test_workbooks_with_arbitrary_cells(rows):
    ingest(workbook(rows), "study.xlsx")


@FUZZ
@given(edits=EDITS)
def test_mangled_sheet_xml_inside_a_sound_zip(edits):
    ingest(with_sheet_xml(mutate(SHEET_XML, edits)), "study.xlsx")
