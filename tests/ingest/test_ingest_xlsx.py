"""Reading XLSX uploads: sheet choice, the zip-bomb guard, cell limits and formula cells."""

import io
import re
import zipfile

import openpyxl
import pytest

from app.ingest import IngestError, UploadTooLarge, read_upload, suggest_roles, validate


def workbook_bytes(sheets):
    """Build an XLSX file from {sheet name: list of rows}."""
    workbook = openpyxl.Workbook()
    workbook.remove(workbook.active)
    for title, rows in sheets.items():
        sheet = workbook.create_sheet(title)
        for row in rows:
            sheet.append(row)
    buffer = io.BytesIO()
    workbook.save(buffer)
    return buffer.getvalue()


RUNS = [["Run", "Temp", "Time", "Yield"], [1, 150, 20, 61.5], [2, 170, 20, 64.0],
        [3, 150, 30, 66.2], [4, 170, 30, 70.9]]
NOTES = [["Note"], ["made by the night shift"]]


def test_first_sheet_with_a_table_by_default_and_all_sheet_names_listed():
    """A workbook that opens with a notes sheet opens on the runs, not on the notes."""
    raw = read_upload(workbook_bytes({"Notes": NOTES, "Runs": RUNS}), "study.xlsx")
    assert raw.file_kind == "xlsx"
    assert raw.sheets == ("Notes", "Runs")
    assert raw.sheet == "Runs"
    assert list(raw.frame.columns) == ["Run", "Temp", "Time", "Yield"]
    only_notes = read_upload(workbook_bytes({"Notes": NOTES, "More": NOTES}), "notes.xlsx")
    assert only_notes.sheet == "Notes" and list(only_notes.frame.columns) == ["Note"]


def test_dates_read_as_dates_and_times_without_a_t():
    import datetime as dt

    rows = [["Run", "Made on", "Started", "Yield"],
            [1, dt.datetime(2026, 11, 17), dt.datetime(2026, 11, 17, 8, 30), 61.5],
            [2, dt.datetime(2026, 11, 18), dt.datetime(2026, 11, 18, 14, 5, 7), 64.0]]
    raw = read_upload(workbook_bytes({"Runs": rows}), "dated.xlsx")
    assert raw.frame["Made on"].tolist() == ["2026-11-17", "2026-11-18"]
    assert raw.frame["Started"].tolist() == ["2026-11-17 08:30:00", "2026-11-18 14:05:07"]


def test_user_chosen_sheet_is_read_as_text_cells():
    raw = read_upload(workbook_bytes({"Notes": NOTES, "Runs": RUNS}), "study.xlsx", sheet="Runs")
    assert raw.sheet == "Runs"
    assert list(raw.frame.columns) == ["Run", "Temp", "Time", "Yield"]
    assert raw.frame.loc[1].tolist() == ["1", "150", "20", "61.5"]
    assert raw.frame.loc[2, "Yield"] == "64"  # openpyxl stores 64.0 as the integer 64
    table = validate(raw, suggest_roles(raw))
    assert table.frame["Yield"].tolist() == [61.5, 64.0, 66.2, 70.9]
    assert table.run_order == "Run"


def test_table_may_start_below_and_right_of_a1():
    workbook = openpyxl.Workbook()
    sheet = workbook.active
    for i, row in enumerate(RUNS):
        for j, value in enumerate(row):
            sheet.cell(row=3 + i, column=2 + j, value=value)
    buffer = io.BytesIO()
    workbook.save(buffer)
    raw = read_upload(buffer.getvalue(), "study.xlsx")
    assert list(raw.frame.columns) == ["Run", "Temp", "Time", "Yield"]
    assert len(raw.frame) == 4


def test_unknown_sheet_names_the_sheets_it_has():
    with pytest.raises(IngestError) as excinfo:
        read_upload(workbook_bytes({"Runs": RUNS}), "study.xlsx", sheet="Results")
    message = str(excinfo.value)
    assert "Sheet 'Results'" in message and "'Runs'" in message


def test_empty_sheet():
    with pytest.raises(IngestError, match="Sheet 'Blank' in 'study.xlsx' is empty"):
        read_upload(workbook_bytes({"Blank": []}), "study.xlsx")


def test_no_header_in_sheet():
    with pytest.raises(IngestError, match="no header row"):
        read_upload(workbook_bytes({"Runs": RUNS[1:]}), "study.xlsx")


def test_duplicate_names_in_sheet():
    rows = [["Temp", "Temp"], [1, 2], [3, 4]]
    with pytest.raises(IngestError, match="Columns 1 and 2"):
        read_upload(workbook_bytes({"Runs": rows}), "study.xlsx")


def test_formula_cells_without_saved_value_name_the_cell():
    # openpyxl writes formulas without cached results, exactly the case a script-made file has.
    rows = [list(r) for r in RUNS]
    rows[4][3] = "=B5*0.4"  # sheet cell D5, data row 4, column Yield
    rows[2][2] = "=C2"      # sheet cell C3, data row 2, column Time
    with pytest.raises(IngestError) as excinfo:
        read_upload(workbook_bytes({"Runs": rows}), "study.xlsx")
    problems = excinfo.value.problems
    assert [p.message for p in problems] == [
        "Sheet 'Runs' cell C3 holds a formula with no saved value; open and save the file in a "
        "spreadsheet program, or paste values.",
        "Sheet 'Runs' cell D5 holds a formula with no saved value; open and save the file in a "
        "spreadsheet program, or paste values.",
    ]
    assert [(p.row, p.column) for p in problems] == [(2, "Time"), (4, "Yield")]


def test_many_formula_cells_are_capped():
    rows = [["A", "B"]] + [[i, f"=A{i + 1}*2"] for i in range(1, 10)]
    with pytest.raises(IngestError) as excinfo:
        read_upload(workbook_bytes({"Runs": rows}), "study.xlsx")
    problems = excinfo.value.problems
    assert len(problems) == 6
    assert problems[-1].message == "Sheet 'Runs' has 4 more formula cells with no saved value."


def test_cached_formula_values_are_read():
    # Hand-write the sheet XML with a formula and its saved result, as spreadsheet programs do.
    base = workbook_bytes({"Runs": [["A", "B"], [1, 2], [2, 4]]})
    sheet_xml = (
        '<?xml version="1.0" encoding="UTF-8" standalone="yes"?>'
        '<worksheet xmlns="http://schemas.openxmlformats.org/spreadsheetml/2006/main">'
        '<sheetData>'
        '<row r="1"><c r="A1" t="inlineStr"><is><t>A</t></is></c>'
        '<c r="B1" t="inlineStr"><is><t>B</t></is></c></row>'
        '<row r="2"><c r="A2"><v>1</v></c><c r="B2"><f>A2*2</f><v>2</v></c></row>'
        '<row r="3"><c r="A3"><v>2</v></c><c r="B3"><f>A3*2</f><v>4</v></c></row>'
        '</sheetData></worksheet>')
    data = replace_member(base, "xl/worksheets/sheet1.xml", sheet_xml.encode())
    raw = read_upload(data, "study.xlsx")
    assert raw.frame["B"].tolist() == ["2", "4"]


def replace_member(data, member, content):
    source = zipfile.ZipFile(io.BytesIO(data))
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w", zipfile.ZIP_DEFLATED) as target:
        for info in source.infolist():
            target.writestr(info.filename, content if info.filename == member
                            else source.read(info.filename))
    return buffer.getvalue()


@pytest.fixture
def openpyxl_must_not_open(monkeypatch):
    """Fail the test if the workbook reaches openpyxl: the guard must act before opening."""
    def refuse(*args, **kwargs):
        raise AssertionError("load_workbook was called on a workbook the guard should refuse")
    import openpyxl  # xlsx_reader imports it when it reads a workbook

    monkeypatch.setattr(openpyxl, "load_workbook", refuse)


def bomb_bytes(declared_bytes, *, extra_members=()):
    """A workbook whose sheet XML is `declared_bytes` long and almost all one repeated cell.

    Written in 1 MB chunks so the test never holds the expanded sheet in memory.
    """
    base = workbook_bytes({"Runs": RUNS})
    source = zipfile.ZipFile(io.BytesIO(base))
    buffer = io.BytesIO()
    chunk = b"<row><c><v>1</v></c></row>" * (1_000_000 // 26)
    with zipfile.ZipFile(buffer, "w", zipfile.ZIP_DEFLATED, compresslevel=9) as target:
        for info in source.infolist():
            if info.filename != "xl/worksheets/sheet1.xml":
                target.writestr(info.filename, source.read(info.filename))
        with target.open("xl/worksheets/sheet1.xml", "w", force_zip64=True) as member:
            written = 0
            while written < declared_bytes:
                member.write(chunk)
                written += len(chunk)
    return buffer.getvalue()


def test_zip_bomb_over_the_uncompressed_limit(openpyxl_must_not_open):
    data = bomb_bytes(210_000_000)
    assert len(data) < 2_000_000  # small on the wire, huge when opened
    with pytest.raises(UploadTooLarge) as excinfo:
        read_upload(data, "study.xlsx")
    message = str(excinfo.value)
    assert re.search(r"would expand to 21\d MB when opened; the limit is 200 MB", message)


def test_zip_bomb_by_compression_ratio(openpyxl_must_not_open):
    data = bomb_bytes(5_000_000)
    with pytest.raises(UploadTooLarge) as excinfo:
        read_upload(data, "study.xlsx")
    message = str(excinfo.value)
    assert "xl/worksheets/sheet1.xml" in message and "zip bomb" in message


def test_limits_are_parameters():
    data = workbook_bytes({"Runs": RUNS})
    with pytest.raises(UploadTooLarge, match="the limit is 1 kB"):
        read_upload(data, "study.xlsx", max_xlsx_uncompressed=1_000)
    # A real sheet over 1 MB: accepted at the default ratio limit, refused at a strict one.
    rows = [["A", "B", "C"]] + [[1, 2, 3]] * 13_000
    big = workbook_bytes({"Runs": rows})
    assert read_upload(big, "study.xlsx").frame.shape == (13_000, 3)
    with pytest.raises(UploadTooLarge, match="limit 2 to 1"):
        read_upload(big, "study.xlsx", max_xlsx_ratio=2)


def test_too_many_cells_in_sheet():
    rows = [["A", "B", "C"]] + [[i, i, i] for i in range(200)]
    with pytest.raises(UploadTooLarge) as excinfo:
        read_upload(workbook_bytes({"Runs": rows}), "study.xlsx", max_cells=300)
    assert "Sheet 'Runs' holds more than 300 cells" in str(excinfo.value)


def test_huge_declared_dimension_does_not_pad_rows():
    # A <dimension ref="A1:XFD1048576"> would make a naive reader build 17 billion cells.
    base = workbook_bytes({"Runs": RUNS})
    sheet = zipfile.ZipFile(io.BytesIO(base)).read("xl/worksheets/sheet1.xml").decode()
    sheet = re.sub(r'<dimension ref="[^"]+"\s*/>', '<dimension ref="A1:XFD1048576"/>', sheet)
    assert "XFD1048576" in sheet
    raw = read_upload(replace_member(base, "xl/worksheets/sheet1.xml", sheet.encode()),
                      "study.xlsx", max_cells=1_000)
    assert raw.frame.shape == (4, 4)


def test_xlsx_named_csv():
    with pytest.raises(IngestError) as excinfo:
        read_upload(workbook_bytes({"Runs": RUNS}), "runs.csv")
    assert "holds an XLSX workbook" in str(excinfo.value)


def test_pdf_named_xlsx():
    with pytest.raises(IngestError, match="holds a PDF document"):
        read_upload(b"%PDF-1.4\n...", "study.xlsx")


def test_zip_that_is_not_a_workbook_named_xlsx():
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w") as archive:
        archive.writestr("word/document.xml", "<w/>")
        archive.writestr("[Content_Types].xml", "<Types/>")
    with pytest.raises(IngestError, match="holds a Word document"):
        read_upload(buffer.getvalue(), "study.xlsx")


def test_damaged_workbook_is_an_ingest_error():
    base = workbook_bytes({"Runs": RUNS})
    data = replace_member(base, "xl/workbook.xml", b"<not-a-workbook")
    with pytest.raises(IngestError, match="cannot be read as an XLSX workbook"):
        read_upload(data, "study.xlsx")


def test_entity_expansion_in_a_sheet_is_refused_by_defusedxml():
    # openpyxl parses through defusedxml when it is installed (a runtime dependency): a
    # document type with entity declarations ("billion laughs") is refused before expansion.
    from openpyxl.xml import DEFUSEDXML

    assert DEFUSEDXML
    base = workbook_bytes({"Runs": RUNS})
    sheet = zipfile.ZipFile(io.BytesIO(base)).read("xl/worksheets/sheet1.xml").decode()
    entities = '<!ENTITY a "' + "x" * 100 + '">' + "".join(
        f'<!ENTITY {c} "{("&" + p + ";") * 10}">' for p, c in zip("abcdefg", "bcdefgh"))
    bomb = sheet.replace("<worksheet", f"<!DOCTYPE worksheet [{entities}]><worksheet", 1)
    bomb = bomb.replace("<v>1</v>", "<v>&h;</v>", 1)
    with pytest.raises(IngestError, match="cannot be read as an XLSX workbook"):
        read_upload(replace_member(base, "xl/worksheets/sheet1.xml", bomb.encode()), "study.xlsx")
