"""A fit of 6,000 runs through the pages: the page, the builder and the review page list what a
person can read (flagged and left-out runs, bins), never one row per run."""

from __future__ import annotations

import re

import numpy as np
import pandas as pd
import pytest

from app.ingest import ColumnRole, read_upload, validate
from app.workflow import fits as fit_service
from app.workflow import studies, uploads
from tests.workflow.helpers import make_fit, submit, user

N = 6000


@pytest.fixture
def big_version(db, users):
    rng = np.random.default_rng(3)
    x = rng.integers(-1, 2, size=(N, 2)).astype(float) * 10 + 50
    y = 5 + 0.2 * x[:, 0] - 0.1 * x[:, 1] + rng.normal(size=N)
    y[[99, 4999]] += 9.0
    frame = pd.DataFrame({"Speed": x[:, 0], "Feed": x[:, 1], "Yield": y,
                          "Order": rng.permutation(N) + 1})
    data = frame.to_csv(index=False).encode()
    roles = {"Speed": ColumnRole("factor"), "Feed": ColumnRole("factor"),
             "Yield": ColumnRole("response"), "Order": ColumnRole("run_order")}
    with db.transaction() as s:
        erin = user(s, "erin")
        study = studies.create_study(s, erin, title="Line speed")
        raw = read_upload(data, "line.csv")
        return uploads.add_data_version(s, erin, study, data=data, filename="line.csv", raw=raw,
                                        table=validate(raw, roles)).id


def test_fit_page_lists_flagged_runs_not_every_run_and_charts_show_bins(actions, db,
                                                                        big_version):
    fit_id = make_fit(db, big_version, model="interaction", response="Yield",
                      exclusions={7: "sensor dropout"})
    actions.login("erin")
    page = actions.client.get(f"/fits/{fit_id}").get_data(as_text=True)
    assert len(page) < 1_500_000
    assert "6,000 runs: this table lists the" in page
    rows = re.findall(r'<tr data-row="(\d+)"', page)
    assert 0 < len(rows) <= fit_service.RUNS_PAGE_MAX
    assert {"100", "5000", "7"} <= set(rows)  # the planted errors and the run left out
    assert f'href="/api/v1/fits/{fit_id}/runs.csv"' in page
    # no run labels in this file: no empty Run column; leverages near 2p/n = 0.0013 read in
    # significant figures, not as 0.000
    head = re.search(r'<table class="data runs">\s*<thead>(.*?)</thead>', page, re.S).group(1)
    assert "<th>Run</th>" not in head and "<th>Order</th>" in head
    planted = re.search(r'<tr data-row="100".*?</tr>', page, re.S).group(0)
    cells = re.findall(r'<td class="num">(.*?)</td>', planted)
    leverage = cells[6]
    assert leverage != "0.000" and 0 < float(leverage) < 0.01
    charts = actions.client.get(f"/fits/{fit_id}/charts.json").get_json()["charts"]
    binned = [c for c in charts if "bins" in c["spec"].get("datasets", {})]
    assert len(binned) >= 8
    assert all("shaded bins" in c["note"] or "bins" in c["note"] or "levels" in c["note"]
               for c in binned)
    # The review page lists the flagged runs it can show and counts the rest.
    submit(db, fit_id)
    actions.logout()
    actions.login("abel")
    review = actions.client.get(f"/fits/{fit_id}/review").get_data(as_text=True)
    assert review.count("<tr><td>") < 400


def test_builder_takes_typed_exclusions_when_runs_are_many(actions, db, big_version):
    actions.login("erin")
    builder = actions.client.get(f"/data/{big_version}/fit").get_data(as_text=True)
    assert builder.count('name="exclude"') == 0 and 'name="exclude_lines"' in builder
    made = actions.post(f"/data/{big_version}/fit", data={
        "response": "Yield", "mode": "named", "model": "linear", "hierarchy": "on",
        "transform": "none", "exclude_lines": "12: probe fouled\n\n40 = restart"})
    assert made.status_code == 302
    fit_id = int(made.headers["Location"].rsplit("/", 1)[1])
    with db.session() as s:
        cols = fit_service.runs_of(fit_service.get_fit(s, fit_id))
        assert sorted(cols.row[cols.excluded].tolist()) == [12, 40]
    refused = actions.post(f"/data/{big_version}/fit", data={
        "response": "Yield", "mode": "named", "model": "linear", "hierarchy": "on",
        "transform": "none", "exclude_lines": "12 probe fouled"})
    assert refused.status_code == 400
    assert "line 1" in refused.get_data(as_text=True)
