"""Reading CSV uploads: encodings, delimiters, decimal marks, and the file-level bad inputs."""

import pytest

from app.ingest import IngestError, UploadTooLarge, read_upload, suggest_roles, validate

PLAIN = "Run,Temp,Time,Yield\n1,150,20,61.5\n2,170,20,64.0\n3,150,30,66.2\n4,170,30,70.9\n"


def problems_of(excinfo):
    return excinfo.value.problems


@pytest.mark.parametrize("delimiter", [",", ";", "\t"])
def test_each_delimiter_is_sniffed(delimiter):
    data = PLAIN.replace(",", delimiter).encode()
    raw = read_upload(data, "runs.csv")
    assert raw.delimiter == delimiter
    assert raw.decimal == "."
    assert list(raw.frame.columns) == ["Run", "Temp", "Time", "Yield"]
    assert raw.frame.loc[4, "Yield"] == "70.9"
    assert list(raw.frame.index) == [1, 2, 3, 4]
    assert raw.file_kind == "csv" and raw.sheets == ()


def test_decimal_comma_with_semicolons():
    data = "Temp;Time;Yield\n150;20,5;61,5\n170;20,5;64\n150;30,5;66,25\n170;30,5;-7,5e1\n"
    raw = read_upload(data.encode(), "runs.csv")
    assert (raw.delimiter, raw.decimal) == (";", ",")
    table = validate(raw, suggest_roles(raw))
    assert table.frame["Yield"].tolist() == [61.5, 64.0, 66.25, -75.0]
    assert table.frame["Time"].tolist() == [20.5, 20.5, 30.5, 30.5]


def test_decimal_comma_with_tabs():
    data = "Temp\tYield\n150\t1,5\n170\t2,5\n150\t3,5\n170\t4,5\n"
    raw = read_upload(data.encode(), "runs.tsv")
    assert (raw.delimiter, raw.decimal) == ("\t", ",")


def test_semicolon_file_with_decimal_points_keeps_point():
    data = "Temp;Yield\n150;1.5\n170;2.5\n150;3.5\n170;4.5\n"
    raw = read_upload(data.encode(), "runs.csv")
    assert (raw.delimiter, raw.decimal) == (";", ".")


def test_utf8_byte_order_mark_is_removed_from_the_first_header():
    data = b"\xef\xbb\xbf" + "Température (°C),Yield\n150,1\n170,2\n".encode()
    raw = read_upload(data, "runs.csv")
    assert raw.encoding == "utf-8-sig"
    assert list(raw.frame.columns) == ["Température (°C)", "Yield"]


def test_utf8_without_mark():
    raw = read_upload("Temp (°C),Yield\n150,1\n170,2\n".encode(), "runs.csv")
    assert raw.encoding == "utf-8"
    assert raw.frame.columns[0] == "Temp (°C)"


def test_latin1_fallback_reads_degree_sign_and_accents():
    data = "Température (°C);Rendement\n150;61,5\n170;64,0\n".encode("latin-1")
    raw = read_upload(data, "essais.csv")
    assert raw.encoding == "latin-1"
    assert list(raw.frame.columns) == ["Température (°C)", "Rendement"]
    assert suggest_roles(raw)["Température (°C)"].units == "°C"


def test_excel_sep_hint_line_sets_the_delimiter():
    raw = read_upload(b"sep=;\nA;B\n1;2\n3;4\n", "x.csv")
    assert raw.delimiter == ";" and list(raw.frame.columns) == ["A", "B"]


def test_whitespace_is_stripped_and_blank_cells_become_none():
    raw = read_upload(b" Temp , Yield \n 150 ,  \n170,2\n", "x.csv")
    assert list(raw.frame.columns) == ["Temp", "Yield"]
    assert raw.frame.loc[1, "Temp"] == "150"
    assert raw.frame.loc[1, "Yield"] is None


def test_trailing_delimiters_and_blank_lines_are_not_columns_or_rows():
    raw = read_upload(b"A,B,,\n1,2,,\n3,4,,\n\n\n", "x.csv")
    assert list(raw.frame.columns) == ["A", "B"]
    assert len(raw.frame) == 2


def test_quoted_cells_with_delimiters_and_newlines():
    raw = read_upload(b'Note,Yield\n"a, b",1\n"two\nlines",2\n', "x.csv")
    assert raw.frame["Note"].tolist() == ["a, b", "two\nlines"]


# ---- bad input: file level -------------------------------------------------------------


@pytest.mark.parametrize("data", [b"", b"   \n\n ", b"\xef\xbb\xbf", b",,,\n,,\n"])
def test_empty_file(data):
    with pytest.raises(IngestError) as excinfo:
        read_upload(data, "runs.csv")
    assert "empty" in str(excinfo.value)
    assert "runs.csv" in str(excinfo.value)


def test_header_only_has_no_data_rows():
    with pytest.raises(IngestError, match="no data rows"):
        read_upload(b"A,B\n", "runs.csv")


def test_no_header_when_first_row_is_all_numbers():
    with pytest.raises(IngestError) as excinfo:
        read_upload(b"1,150,20,61.5\n2,170,20,64.0\n", "runs.csv")
    (problem,) = problems_of(excinfo)
    assert "no header row" in problem.message
    assert "first row" in problem.message


def test_number_like_header_cell_is_named_by_column():
    with pytest.raises(IngestError) as excinfo:
        read_upload(b"Temp,20,Yield\n1,2,3\n", "runs.csv")
    (problem,) = problems_of(excinfo)
    assert "column 2" in problem.message and "'20'" in problem.message
    assert problem.column == "20"


def test_unnamed_column_with_values_names_column_and_rows():
    with pytest.raises(IngestError) as excinfo:
        read_upload(b"Temp,,Yield\n1,5,3\n2,,4\n3,7,5\n", "runs.csv")
    (problem,) = problems_of(excinfo)
    assert "column 2 has no name" in problem.message
    assert "rows 1 and 3" in problem.message
    assert problem.row == 1


def test_value_beyond_last_named_column():
    with pytest.raises(IngestError) as excinfo:
        read_upload(b"Temp,Yield\n1,2\n3,4,99\n", "runs.csv")
    (problem,) = problems_of(excinfo)
    assert "column 3 has no name" in problem.message and "row 2 holds" in problem.message
    assert problem.row == 2


def test_duplicate_column_names():
    with pytest.raises(IngestError) as excinfo:
        read_upload(b"Temp,Yield,Temp\n1,2,3\n4,5,6\n", "runs.csv")
    (problem,) = problems_of(excinfo)
    assert "Columns 1 and 3" in problem.message and "'Temp'" in problem.message
    assert problem.column == "Temp"


def test_duplicate_names_differing_only_in_case_or_spaces():
    with pytest.raises(IngestError) as excinfo:
        read_upload(b"Temp,Yield, temp \n1,2,3\n4,5,6\n", "runs.csv")
    assert "Columns 1 and 3" in str(excinfo.value)


def test_over_the_size_limit_is_upload_too_large_and_states_the_limit():
    data = PLAIN.encode() * 10
    with pytest.raises(UploadTooLarge) as excinfo:
        read_upload(data, "runs.csv", max_bytes=100)
    message = str(excinfo.value)
    assert "100 bytes" in message and "runs.csv" in message


def test_default_size_limit_is_20_mb():
    data = b"A,B\n" + b"1,2\n" * 5_000_001
    with pytest.raises(UploadTooLarge, match="the limit is 20 MB"):
        read_upload(data, "runs.csv")


def test_too_many_cells():
    data = ("A,B,C\n" + "1,2,3\n" * 50).encode()
    with pytest.raises(UploadTooLarge) as excinfo:
        read_upload(data, "runs.csv", max_cells=100)
    assert "100 cells" in str(excinfo.value) and "line 34" in str(excinfo.value)


@pytest.mark.parametrize("data, found", [
    (b"%PDF-1.7\n1 0 obj <<>> endobj\n", "PDF"),
    (b"\x89PNG\r\n\x1a\n\x00\x00\x00\rIHDR", "PNG"),
    (b"\xd0\xcf\x11\xe0\xa1\xb1\x1a\xe1" + b"\x00" * 40, "old binary Office"),
    (b"<!DOCTYPE html><html><body>1,2</body></html>", "web page"),
])
def test_binary_or_other_formats_named_csv(data, found):
    with pytest.raises(IngestError) as excinfo:
        read_upload(data, "runs.csv")
    message = str(excinfo.value)
    assert found in message and "runs.csv" in message


def test_zip_renamed_csv(tmp_path):
    import io
    import zipfile
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w") as archive:
        archive.writestr("data.txt", "A,B\n1,2\n")
    with pytest.raises(IngestError, match="zip archive"):
        read_upload(buffer.getvalue(), "runs.csv")


def test_nul_bytes_are_not_text():
    with pytest.raises(IngestError) as excinfo:
        read_upload(b"A,B\n1,2\n3,\x00\x004\n", "runs.csv")
    assert "NUL" in str(excinfo.value) and "line 3" in str(excinfo.value)


def test_control_characters_are_not_text():
    with pytest.raises(IngestError, match="line 2"):
        read_upload(b"A,B\n1,\x012\n", "runs.csv")


def test_utf16_is_refused_with_advice():
    with pytest.raises(IngestError, match="UTF-16"):
        read_upload("A,B\n1,2\n".encode("utf-16"), "runs.csv")


def test_bad_utf8_after_byte_order_mark_names_the_line():
    with pytest.raises(IngestError, match="line 3"):
        read_upload(b"\xef\xbb\xbfA,B\n1,2\n3,\xff\n", "runs.csv")


@pytest.mark.parametrize("name", ["runs.json", "runs", "runs.xlsb"])
def test_unknown_extension(name):
    with pytest.raises(IngestError, match="extension"):
        read_upload(PLAIN.encode(), name)


def test_old_xls_extension_is_refused_with_advice():
    with pytest.raises(IngestError, match=r"\.xls workbook"):
        read_upload(b"\xd0\xcf\x11\xe0\xa1\xb1\x1a\xe1" + b"\x00" * 40, "runs.xls")


def test_text_named_xlsx():
    with pytest.raises(IngestError) as excinfo:
        read_upload(PLAIN.encode(), "runs.xlsx")
    assert "runs.xlsx" in str(excinfo.value) and "holds text" in str(excinfo.value)
