"""The column-wise per-run block: exact round trip, same bytes for the same table, and bytes
that are not such a block refused."""

from __future__ import annotations

import hashlib
import math

import numpy as np
import pytest

from app.analysis import Factor, FitSpec, analyse, runstore
from app.demo_data import rsm_study
from app.ingest import read_upload, validate


@pytest.fixture(scope="module")
def result():
    demo = rsm_study()
    table = validate(read_upload(demo.csv_bytes, demo.filename), demo.roles)
    factors = tuple(Factor(n, r.low, r.high, r.units) for n, r in demo.roles.items()
                    if r.role == "factor")
    spec = FitSpec(response="Hardness", factors=factors, run_order="Run order",
                   label="Panel ID", model="quadratic", exclusions=((3, "panel scratched"),))
    return analyse(table.frame, spec)


def _same(a, b) -> bool:
    """Equal per-run objects, NaN-free: None where a value is missing on both sides."""
    if isinstance(a, dict):
        return a.keys() == b.keys() and all(_same(a[k], b[k]) for k in a)
    if isinstance(a, float) and isinstance(b, float):
        return a == b or (math.isnan(a) and math.isnan(b))
    return a == b


def test_block_gives_back_exactly_the_per_run_objects_of_the_full_document(result):
    doc, block = result.stored()
    records = result.to_dict()["runs"]
    cols = runstore.decode(block)
    assert len(cols) == len(records) == 20
    assert all(_same(a, b) for a, b in zip(cols.records(), records, strict=True))
    # Pages of the table are slices of the same objects.
    assert cols.records(5, 9) == cols.records()[5:9]
    assert cols.records(18, 40) == cols.records()[18:]
    # The document names the block by its SHA-256 and counts.
    assert doc["runs"] == {"format": runstore.FORMAT, "sha256": hashlib.sha256(block).hexdigest(),
                           "bytes": len(block), "n": 20, "excluded": 1,
                           "flagged": len(result.run_flags())}
    assert records[2]["excluded"] and records[2]["exclusion_reason"] == "panel scratched"


def test_same_table_same_bytes_and_older_documents_convert_to_the_same_block(result):
    _, first = result.stored()
    _, again = result.stored()
    assert first == again
    # A fit stored before the block existed kept per-run objects in its document.
    assert runstore.encode(runstore.from_records(result.to_dict()["runs"])) == first


def test_numbers_survive_bit_for_bit(result):
    cols = runstore.decode(result.stored()[1])
    for name in runstore.NUMERIC:
        expected = np.asarray(getattr(result.runs, name), dtype=float)
        assert np.array_equal(cols[name], expected, equal_nan=True), name


@pytest.mark.parametrize("damage, message", [
    (lambda b: b"XXXXXXX\n" + b[8:], "bad magic"),
    (lambda b: b[:-5], "cut short"),
    (lambda b: b + b"\x00", "after its last column"),
])
def test_bytes_that_are_not_a_block_are_refused(result, damage, message):
    block = result.stored()[1]
    with pytest.raises(runstore.RunStoreError, match=message):
        runstore.decode(damage(block))
