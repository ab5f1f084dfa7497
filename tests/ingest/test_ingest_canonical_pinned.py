"""The canonical CSV bytes are pinned: stored data versions are hashed over them.

The digests below were recorded from the row-by-row writer that came before the column-wise
one; a change of a single byte in any of these tables fails the test. The "random" table was
made from numpy's random draws until a newer numpy (2.4.6 here) drew other doubles from the same
seed; it is now made from integer draws and its digest re-recorded, with every cell also checked
against Python's shortest round-trip text of its double (``repr``), which the writer promises.
"""

import csv
import hashlib
import io
import math
import random

import numpy as np
import pytest

from app.ingest import ColumnRole, IngestError, load_canonical, read_upload, validate
from app.ingest.canonical import design_table, typed_frame

_AWKWARD = ["0.30000000000000004", "1e-300", "-0.0", "123456789012345678", "1.7976931348623157e308",
            "5e-324", "2.2250738585072014e-308", "1e16", "1e22", "-123.456", "007", "1.", ".5",
            "+3", "1E5", "0.1"]


def _point_table():
    lines = ["Run,A,B (mm),Y,Humidity,Lot,Note"]
    labels = ['x, "y"', "plain", "", "=SUM(A1)", 'quote "only"', "naïve – ü", "a\nb", " pad "]
    for i, y in enumerate(_AWKWARD):
        label = labels[i % len(labels)]
        quoted = '"' + label.replace('"', '""') + '"'
        lines.append(f"{len(_AWKWARD) - i},{(-1) ** i},{(i % 3) * 2.5},{y},{40 + i / 7!r},"
                     f"L{i % 3},{quoted}")
    raw = read_upload(("\n".join(lines) + "\n").encode(), "p.csv")
    roles = {"Run": ColumnRole("run_order"), "A": ColumnRole("factor", low=-1.0, high=1.0),
             "B (mm)": ColumnRole("factor", units="mm"), "Y": ColumnRole("response"),
             "Humidity": ColumnRole("covariate", kind="numeric"),
             "Lot": ColumnRole("covariate", kind="categorical"), "Note": ColumnRole("label")}
    return validate(raw, roles)


def _comma_table():
    text = ("Lauf;Temp;Zeit;Ausbeute;Block;Bemerkung\n"
            "3;150;1,5;0,1;I;\"gut; sehr\"\n"
            "1;170;2,5;-0,0;I;\n"
            "2;150;2,5;1,25e-3;II;\"Ölbad, neu\"\n"
            "4;170;1,5;12345678901234,5;II;x\n")
    raw = read_upload(text.encode("latin-1"), "k.csv")
    roles = {"Lauf": ColumnRole("run_order"), "Temp": ColumnRole("factor", low=150.0, high=170.0),
             "Zeit": ColumnRole("factor"), "Ausbeute": ColumnRole("response"),
             "Block": ColumnRole("block"), "Bemerkung": ColumnRole("label")}
    return validate(raw, roles)


def _built_table():
    roles = {"order": ColumnRole("run_order"), "x": ColumnRole("factor"),
             "y": ColumnRole("response"), "blk": ColumnRole("block"),
             "skip": ColumnRole("ignore")}
    n = 7
    columns = {
        "order": [2**53, 1, 2, 3, 10**12, 5, 6],
        "x": [0.1 + 0.2, 1 / 3, -0.0, 1e-300, 2.0**60, float(np.float64(0.7)), -5.0],
        "y": list(np.linspace(-1, 1, n) * np.pi),
        "blk": ["a,b", 'c"d', "é", "1", "2.0", "x", "y"],
    }
    return design_table(typed_frame(columns, roles, n), roles)


def _random_table():
    """500 rows of awkward doubles made from integer draws with exact or correctly rounded
    arithmetic only (Python's Mersenne Twister bits, ldexp, one IEEE multiply), so the same
    on every numpy, platform and release: numpy's own normal draws and powers are not."""
    draw = random.Random(1)
    n = 500

    def signed(bits: int, exponent_low: int, exponent_high: int) -> float:
        mantissa = draw.getrandbits(bits) * (1 if draw.getrandbits(1) else -1)
        return math.ldexp(mantissa, draw.randint(exponent_low, exponent_high) - bits)

    roles = {"A": ColumnRole("factor"), "B": ColumnRole("factor"), "Y": ColumnRole("response"),
             "Z": ColumnRole("response")}
    columns = {"A": [float(draw.choice((-1, 0, 1))) for _ in range(n)],
               "B": [signed(53, 0, 24) * 1e6 for _ in range(n)],
               "Y": [signed(53, -8, 3) for _ in range(n)],
               "Z": [signed(53, -700, -640) for _ in range(n)]}
    return design_table(typed_frame(columns, roles, n), roles)


PINNED = {
    "point": (_point_table,
              "270d1a4e30196ec0620631800208a5bbaf7bec5330832debd8544edd816e8891"),
    "comma": (_comma_table,
              "2b26536ea9376b3b9a81203805d7625f2e30dde7c6c3771be1c289ad551d034b"),
    "built": (_built_table,
              "a527f78890ed5f5adbf84217d2cca22526a7052c6daac46d1803cf9a9eb83fd4"),
    "random": (_random_table,
              "21ed175c550847a0fab7c12e4a5dfca3d5185403d6f93067d1c8bc730eadd4ff"),
}


@pytest.mark.parametrize("key", sorted(PINNED))
def test_canonical_bytes_are_pinned(key):
    make, digest = PINNED[key]
    table = make()
    data = table.to_canonical_csv()
    assert hashlib.sha256(data).hexdigest() == digest
    loaded = load_canonical(data, table.roles_json())
    assert loaded == table
    assert loaded.to_canonical_csv() == data


def test_small_table_bytes_are_pinned_literally():
    assert _comma_table().to_canonical_csv() == (
        b'row,Lauf,Temp,Zeit,Ausbeute,Block,Bemerkung\n'
        b'1,3,150.0,1.5,0.1,I,gut; sehr\n'
        b'2,1,170.0,2.5,-0.0,I,\n'
        b'3,2,150.0,2.5,0.00125,II,"\xc3\x96lbad, neu"\n'
        b'4,4,170.0,1.5,12345678901234.5,II,x\n')


@pytest.mark.parametrize(("old", "new", "messages"), [
    (b"\n2,1,", b"\n3,1,", ["Stored table row 2 is malformed."]),
    (b"2,1,170.0", b"2,1", ["Stored table row 2 is malformed."]),
    (b"1.5,0.1,", b"1.5,nan,", ["Stored table column 'Ausbeute' row 1: 'nan' is not valid."]),
    (b"\n4,4,", b"\n4,4.5,", ["Stored table column 'Lauf' row 4: '4.5' is not valid."]),
])
def test_damaged_stored_table_names_row_and_column(old, new, messages):
    table = _comma_table()
    damaged = table.to_canonical_csv().replace(old, new)
    with pytest.raises(IngestError) as err:
        load_canonical(damaged, table.roles_json())
    assert [p.message for p in err.value.problems] == messages


def test_random_table_cells_are_the_shortest_round_trip_text_of_each_double():
    table = _random_table()
    rows = list(csv.reader(io.StringIO(table.to_canonical_csv().decode())))
    header, body = rows[0], rows[1:]
    assert header == ["row", "A", "B", "Y", "Z"] and len(body) == 500
    for i, row in enumerate(body):
        for name, text in zip(header[1:], row[1:], strict=True):
            value = float(table.frame[name].iloc[i])
            assert text == repr(value), (i, name)
