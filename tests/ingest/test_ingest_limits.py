"""Length caps on one cell and one column name, for CSV and XLSX, and the long-string guard."""

import io
import random
import re
import string
import tracemalloc
import zipfile

import pytest

import app.ingest as ingest
from app.ingest import IngestError, UploadTooLarge, read_upload
from app.ingest.limits import MAX_CELL_CHARS, MAX_HEADER_CHARS, MAX_XLSX_STRING_CHARS
from tests.ingest.test_ingest_xlsx import openpyxl_must_not_open, workbook_bytes  # noqa: F401


def messages(err):
    return [p.message for p in err.value.problems]


def test_limits_live_in_one_module_and_are_reexported():
    assert (MAX_CELL_CHARS, MAX_HEADER_CHARS) == (1_000, 200)
    assert ingest.DEFAULT_MAX_BYTES == 20_000_000
    assert ingest.DEFAULT_MAX_CELLS == 2_000_000
    assert ingest.MAX_CELL_CHARS is MAX_CELL_CHARS


def test_csv_cell_at_the_cap_is_read():
    raw = read_upload(f"A,Y\n1,{'x' * MAX_CELL_CHARS}\n".encode(), "c.csv")
    assert len(raw.frame.loc[1, "Y"]) == MAX_CELL_CHARS


def test_csv_cell_over_the_cap_names_column_row_and_limit():
    long = "x" * 5_000
    text = f"A,Note,Y\n1,ok,2\n2,{long},3\n3,ok,4\n4,{long}y,5\n"
    with pytest.raises(IngestError) as err:
        read_upload(text.encode(), "c.csv")
    assert not isinstance(err.value, UploadTooLarge)
    assert messages(err) == [
        "Column 'Note' rows 2 and 4: a cell may hold at most 1,000 characters, and the longest "
        "here holds 5,001."]
    assert (err.value.problems[0].row, err.value.problems[0].column) == (2, "Note")


def test_csv_cell_over_the_csv_module_field_limit_gets_the_same_message():
    text = "A;Y\n1;" + "7" * 200_000 + "\n"
    with pytest.raises(IngestError) as err:
        read_upload(text.encode(), "c.csv")
    assert messages(err) == [
        "Column 'Y' row 1: a cell may hold at most 1,000 characters, and the longest here "
        "holds 200,000."]


def test_csv_header_over_the_cap_names_the_column_position():
    text = f"A,{'N' * 250},Y\n1,2,3\n"
    with pytest.raises(IngestError) as err:
        read_upload(text.encode(), "c.csv")
    assert messages(err) == [
        "Header row: the name of column 2 is 250 characters long; a column name may hold at "
        "most 200."]
    assert read_upload(f"A,{'N' * 200}\n1,2\n".encode(), "c.csv").frame.shape == (1, 2)


def test_xlsx_cell_over_the_cap_names_column_and_row():
    data = workbook_bytes({"Runs": [["Run", "Note"], [1, "fine"], [2, "z" * 1_500]]})
    with pytest.raises(IngestError) as err:
        read_upload(data, "w.xlsx")
    assert messages(err) == [
        "Column 'Note' row 2: a cell may hold at most 1,000 characters, and the longest here "
        "holds 1,500."]


def test_xlsx_header_over_the_cap_names_the_column_position():
    data = workbook_bytes({"Runs": [["Run", "H" * 201], [1, 2]]})
    with pytest.raises(IngestError) as err:
        read_upload(data, "w.xlsx")
    assert messages(err) == [
        "Header row: the name of column 2 is 201 characters long; a column name may hold at "
        "most 200."]


_MAIN = b'xmlns="http://schemas.openxmlformats.org/spreadsheetml/2006/main"'
_SST_TYPE = b"application/vnd.openxmlformats-officedocument.spreadsheetml.sharedStrings+xml"
_SST_REL = (b"http://schemas.openxmlformats.org/officeDocument/2006/relationships/"
            b"sharedStrings")


def _with_shared_string(base: bytes, chunks: bytes, count: int, *, runs: bool = False) -> bytes:
    """Make cell B2 of ``base`` a shared string written from ``chunks`` repeated ``count`` times
    (each repeat its own rich-text run when ``runs``), streamed so the test never holds it."""
    source = zipfile.ZipFile(io.BytesIO(base))
    wired = {
        "[Content_Types].xml": lambda x: x.replace(b"</Types>", b'<Override PartName="/xl/'
                                                   b'sharedStrings.xml" ContentType="' + _SST_TYPE
                                                   + b'" /></Types>'),
        "xl/_rels/workbook.xml.rels": lambda x: x.replace(
            b"</Relationships>", b'<Relationship Id="rIdSst" Type="' + _SST_REL
            + b'" Target="sharedStrings.xml" /></Relationships>'),
        "xl/worksheets/sheet1.xml": lambda x: re.sub(
            rb'<c r="B2" t="inlineStr"><is><t>[^<]*</t></is></c>',
            b'<c r="B2" t="s"><v>0</v></c>', x),
    }
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w", zipfile.ZIP_DEFLATED, compresslevel=1) as target:
        for info in source.infolist():
            content = source.read(info.filename)
            target.writestr(info.filename, wired.get(info.filename, lambda x: x)(content))
        with target.open("xl/sharedStrings.xml", "w", force_zip64=True) as member:
            member.write(b"<sst " + _MAIN + b' count="1" uniqueCount="1"><si>')
            piece = b"<r><t>" + chunks + b"</t></r>" if runs else chunks
            member.write(b"" if runs else b"<t>")
            for _ in range(count):
                member.write(piece)
            member.write(b"</si></sst>" if runs else b"</t></si></sst>")
    return buffer.getvalue()


def test_a_wired_shared_string_is_read_as_the_cell():
    data = _with_shared_string(workbook_bytes({"Runs": [["Run", "Note"], [1, "x"]]}),
                               b"ab", 3)
    assert read_upload(data, "w.xlsx").frame.loc[1, "Note"] == "ababab"
    data = _with_shared_string(workbook_bytes({"Runs": [["Run", "Note"], [1, "x"]]}),
                               b"ab", 3, runs=True)
    assert read_upload(data, "w.xlsx").frame.loc[1, "Note"] == "ababab"


def test_rich_text_runs_count_together(openpyxl_must_not_open):  # noqa: F811
    # No run is long, but the string they make is longer than a cell can hold.
    data = _with_shared_string(workbook_bytes({"Runs": [["Run", "Note"], [1, "x"]]}),
                               b"r" * 1_000, 40, runs=True)
    with pytest.raises(UploadTooLarge, match="more than a spreadsheet cell can hold"):
        read_upload(data, "w.xlsx")


@pytest.mark.parametrize("cell", [
    b'<c r="B2" t="inlineStr"><is><t>' + b"q" * 40_000 + b"</t></is></c>",
    b'<c r="B2" t="inlineStr"><is>' + (b"<r><t>" + b"q" * 500 + b"</t></r>") * 80 + b"</is></c>",
    b'<c r="B2" t="str"><v>' + b"7" * 40_000 + b"</v></c>",
])
def test_long_strings_inside_a_worksheet_are_refused(openpyxl_must_not_open, cell):  # noqa: F811
    base = workbook_bytes({"Runs": [["Run", "Note"], [1, "x"]]})
    sheet = zipfile.ZipFile(io.BytesIO(base)).read("xl/worksheets/sheet1.xml")
    sheet = re.sub(rb'<c r="B2" t="inlineStr"><is><t>[^<]*</t></is></c>', cell, sheet)
    source = zipfile.ZipFile(io.BytesIO(base))
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w", zipfile.ZIP_DEFLATED) as target:
        for info in source.infolist():
            target.writestr(info.filename, sheet if info.filename == "xl/worksheets/sheet1.xml"
                            else source.read(info.filename))
    with pytest.raises(UploadTooLarge, match="'xl/worksheets/sheet1.xml' holds a text of more"):
        read_upload(buffer.getvalue(), "w.xlsx")


def test_string_longer_than_any_cell_is_refused_before_openpyxl(openpyxl_must_not_open):  # noqa: F811
    base = workbook_bytes({"Runs": [["Run", "Note"], [1, "x"]]})
    data = _with_shared_string(base, b"abcdefghij", (MAX_XLSX_STRING_CHARS // 10) + 1)
    with pytest.raises(UploadTooLarge) as err:
        read_upload(data, "w.xlsx")
    assert messages(err) == [
        "'w.xlsx' part 'xl/sharedStrings.xml' holds a text of more than 32,767 characters, more "
        "than a spreadsheet cell can hold; a cell may hold at most 1,000. The workbook is "
        "refused."]


def test_small_workbook_expanding_to_a_huge_string_is_refused_early(openpyxl_must_not_open):  # noqa: F811
    # About 2 MB on disk, 150 MB of one shared string once expanded: under the archive limits
    # (200 MB in all, 100 to 1 per part), so only the string guard stands in the way.
    letters = random.Random(1).choices(string.ascii_letters, k=1_700)
    chunk = "".join(letters[:1_000]).encode() * 63 + "".join(letters[1_000:]).encode()
    data = _with_shared_string(workbook_bytes({"Runs": [["Run", "Note"], [1, "x"]]}),
                               chunk, 150_000_000 // len(chunk))
    assert len(data) < 3_000_000
    sizes = {i.filename: i.file_size for i in zipfile.ZipFile(io.BytesIO(data)).infolist()}
    assert sizes["xl/sharedStrings.xml"] > 149_000_000
    tracemalloc.start()
    try:
        with pytest.raises(UploadTooLarge, match="more than a spreadsheet cell can hold"):
            read_upload(data, "w.xlsx")
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert peak < 20_000_000  # stopped within the first pieces, never holding the string


def _long_shared_string(opening: bytes = b"<si>", part: str = "xl/sharedStrings.xml") -> bytes:
    """A workbook whose one shared string is longer than any cell, in rich-text runs none of
    which is long, opened with ``opening`` and stored in ``part`` (content types and the
    workbook's relationship follow the name)."""
    base = workbook_bytes({"Runs": [["Run", "Note"], [1, "x"]]})
    data = _with_shared_string(base, b"r" * 1_000, MAX_XLSX_STRING_CHARS // 1_000 + 1, runs=True)
    usual = "xl/sharedStrings.xml"
    source = zipfile.ZipFile(io.BytesIO(data))
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w", zipfile.ZIP_DEFLATED) as target:
        for info in source.infolist():
            content = source.read(info.filename)
            if info.filename == usual:
                content = content.replace(b"<si>", opening, 1)
            content = content.replace(b"/" + usual.encode(), b"/" + part.encode())  # content types
            content = content.replace(usual.rpartition("/")[2].encode(),  # the relationship
                                      part.rpartition("/")[2].encode())
            name = part if info.filename == usual else info.filename
            target.writestr(name, content)
    return buffer.getvalue()


@pytest.mark.parametrize("opening", [b"<si >", b'<si xml:space="preserve">', b"<si><si>"])
def test_a_long_shared_string_is_refused_however_its_tag_is_written(
        openpyxl_must_not_open, opening):  # noqa: F811
    with pytest.raises(UploadTooLarge, match="more than a spreadsheet cell can hold"):
        read_upload(_long_shared_string(opening), "w.xlsx")


def test_a_long_shared_string_is_refused_whatever_its_part_is_called(
        openpyxl_must_not_open):  # noqa: F811
    with pytest.raises(UploadTooLarge, match="part 'xl/strs.xml' holds a text of more"):
        read_upload(_long_shared_string(part="xl/strs.xml"), "w.xlsx")


def test_document_type_in_shared_strings_is_refused():
    base = workbook_bytes({"Runs": [["Run", "Note"], [1, "x"]]})
    data = _with_shared_string(base, b"x", 1)
    source = zipfile.ZipFile(io.BytesIO(data))
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w") as target:
        for info in source.infolist():
            content = source.read(info.filename)
            if info.filename == "xl/sharedStrings.xml":
                content = b'<!DOCTYPE sst [<!ENTITY e "x">]>' + content
            target.writestr(info.filename, content)
    with pytest.raises(IngestError, match="cannot be read as an XLSX workbook"):
        read_upload(buffer.getvalue(), "w.xlsx")
