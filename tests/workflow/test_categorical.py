"""A data version with a categorical factor: the fit spec carries its levels in file order and
the stored fit has one ANOVA row for it (statsmodels agreement is in tests/analysis)."""

from __future__ import annotations

import json

from app.analysis import Thresholds
from app.ingest import ColumnRole, read_upload, validate
from app.workflow import fits, studies, uploads
from tests.workflow.helpers import user

CSV = (b"Machine,Speed,Gloss\n"
       b"M2,10,81.5\nM1,20,84.0\nM3,10,80.2\nM2,20,86.9\nM1,10,79.1\nM3,20,83.3\n"
       b"M2,15,84.4\nM1,15,81.8\nM3,15,82.0\n")
ROLES = {"Machine": ColumnRole("factor", kind="categorical"),
         "Speed": ColumnRole("factor", low=10.0, high=20.0),
         "Gloss": ColumnRole("response")}


def test_fit_of_a_categorical_factor_through_the_services(db, users):
    with db.transaction() as s:
        erin = user(s, "erin")
        study = studies.create_study(s, erin, title="Gloss")
        raw = read_upload(CSV, "gloss.csv")
        version = uploads.add_data_version(s, erin, study, data=CSV, filename="gloss.csv",
                                           raw=raw, table=validate(raw, ROLES))
        spec = fits.build_spec(version, response="Gloss", model="linear",
                               thresholds=Thresholds())
        assert spec.factors[0].levels == ("M2", "M1", "M3")
        assert spec.factors[1].levels is None
        fit_id = fits.create_fit(s, erin, version, spec).id
    with db.session() as s:
        doc = fits.results_of(fits.get_fit(s, fit_id))
        assert json.loads(fits.get_fit(s, fit_id).spec_json)["factors"][0]["levels"] == [
            "M2", "M1", "M3"]
        sources = [r["source"] for r in doc["anova"]]
        assert sources.count("Machine") == 1
        assert next(r for r in doc["anova"] if r["source"] == "Machine")["df"] == 2
        assert [c["term"] for c in doc["coefficients"]][:3] == ["Intercept", "Machine[M2]",
                                                                 "Machine[M1]"]
        assert doc["design"]["kind"] == "general"
