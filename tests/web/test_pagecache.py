"""The rendered-page cache (app.web.pagecache): reused while nothing shown can have changed,
never stale after a stored change, never shared between viewers, and never hiding tampering."""

from __future__ import annotations

import json

import pytest
from sqlalchemy import text

from app.store.audit import canonical_json
from app.store.models import Fit
from app.web.pagecache import Page, PageCache, rows_digest
from app.workflow import accounts
from tests.store.signed_rows import drop_signed_row_triggers
from tests.workflow import helpers as h


def _cache(app) -> PageCache:
    return app.extensions["plumbline.page_cache"]


@pytest.fixture
def fit_ids(db, users):
    study_id = h.make_study(db)
    version_id = h.add_version(db, study_id)
    return study_id, version_id, h.make_fit(db, version_id)


def test_a_page_is_rendered_once_then_reused(app, actions, fit_ids):
    study_id, _, fit_id = fit_ids
    actions.login("erin")
    for url in (f"/studies/{study_id}", f"/fits/{fit_id}"):
        first = actions.client.get(url)
        hits = _cache(app).hits
        second = actions.client.get(url)
        assert first.status_code == second.status_code == 200
        assert second.get_data() == first.get_data()
        assert _cache(app).hits == hits + 1


def test_a_change_through_a_service_shows_on_the_next_request(app, actions, db, fit_ids):
    study_id, version_id, fit_id = fit_ids
    actions.login("erin")
    assert "Submit for review" in actions.client.get(f"/fits/{fit_id}").get_data(as_text=True)
    before = actions.client.get(f"/studies/{study_id}").get_data(as_text=True)
    assert "review below p = 0.05" in before
    second = h.make_fit(db, version_id, model="linear")
    h.submit(db, fit_id)
    with db.transaction() as s:
        from app.workflow import studies

        studies.set_thresholds(s, h.user(s, "erin"), studies.get_study(s, study_id),
                               review_below=0.1, fail_below=0.02, reason="tighter screen")
    after = actions.client.get(f"/studies/{study_id}").get_data(as_text=True)
    assert "review below p = 0.1," in after and f"Fit {second}" in after
    page = actions.client.get(f"/fits/{fit_id}").get_data(as_text=True)
    assert "Submit for review" not in page and "submitted" in page


def test_viewers_never_get_each_others_rendering(app, client, fit_ids, users):
    study_id, _, _ = fit_ids
    from tests.conftest import Actions

    erin, again, otto = (Actions(app.test_client()) for _ in range(3))
    erin.login("erin")
    again.login("erin")  # one person signed in twice, before either asks for the page
    otto.login("otto")
    as_erin = erin.client.get(f"/studies/{study_id}").get_data(as_text=True)
    as_otto = otto.client.get(f"/studies/{study_id}").get_data(as_text=True)
    assert "Upload data" in as_erin and "Erin Engineer" in as_erin
    assert "Upload data" not in as_otto and "Otto Auditor" in as_otto
    # Each page carries its own session's form token, never another's, even for one person
    # signed in twice.
    assert erin.csrf() in as_erin and erin.csrf() not in as_otto
    as_erin_again = again.client.get(f"/studies/{study_id}").get_data(as_text=True)
    assert again.csrf() in as_erin_again and erin.csrf() not in as_erin_again


def test_a_role_change_shows_at_once(app, actions, db, fit_ids):
    study_id, _, _ = fit_ids
    # An auditor who is also an engineer on the study's team may upload; without the engineer
    # role (a change that touches neither the study nor the team) the button goes at once.
    with db.transaction() as s:
        accounts.set_roles(s, h.user(s, "root"), "otto", "auditor,engineer")
    h.join(db, study_id, "otto")
    actions.login("otto")
    assert "Upload data" in actions.client.get(f"/studies/{study_id}").get_data(as_text=True)
    with db.transaction() as s:
        accounts.set_roles(s, h.user(s, "root"), "otto", "auditor")
    assert "Upload data" not in actions.client.get(f"/studies/{study_id}").get_data(as_text=True)


def test_tampering_behind_the_services_shows_on_a_cached_fit_page(app, actions, db, fit_ids):
    """A direct UPDATE appends no audit event; the fit page's key covers the rows it checks."""
    _, _, fit_id = fit_ids
    actions.login("erin")
    assert "hash verified" in actions.client.get(f"/fits/{fit_id}").get_data(as_text=True)
    with db.transaction() as s:
        doc = json.loads(s.get(Fit, fit_id).results_json)
        doc["coefficients"][1]["estimate"] += 1e-6
        drop_signed_row_triggers(s)
        s.execute(text("UPDATE fits SET results_json = :j WHERE id = :i"),
                  {"j": canonical_json(doc), "i": fit_id})
    page = actions.client.get(f"/fits/{fit_id}").get_data(as_text=True)
    assert "hash does not match" in page and "hash verified" not in page


def test_a_flashed_message_is_shown_once_and_never_cached(app, actions, fit_ids):
    study_id, _, _ = fit_ids
    actions.login("erin")
    actions.client.get(f"/studies/{study_id}")
    response = actions.post(f"/studies/{study_id}/thresholds",
                            data={"review_below": "0.05", "fail_below": "0.01",
                                  "reason": "same again"}, follow_redirects=True)
    assert "Thresholds changed" in response.get_data(as_text=True)
    assert "Thresholds changed" not in actions.client.get(
        f"/studies/{study_id}").get_data(as_text=True)


def test_a_missing_page_stays_a_404(app, actions, users):
    actions.login("erin")
    assert actions.client.get("/studies/999").status_code == 404
    assert actions.client.get("/fits/999").status_code == 404


def test_the_cache_can_be_turned_off(app, actions, fit_ids):
    app.config["PAGE_CACHE_MB"] = 0
    study_id, _, _ = fit_ids
    actions.login("erin")
    assert actions.client.get(f"/studies/{study_id}").status_code == 200
    assert "plumbline.page_cache" not in app.extensions


def test_the_cache_keeps_within_its_byte_budget_dropping_the_oldest():
    """Both forms of a page count against the budget (4 + 1 bytes each here)."""
    def page(text):
        return Page(text, text[:1])

    cache = PageCache(max_bytes=10)
    cache.put(("a",), page(b"aaaa"))
    cache.put(("b",), page(b"bbbb"))
    assert cache.get(("a",)) == page(b"aaaa")  # now the most recently used
    cache.put(("c",), page(b"cccc"))
    assert cache.get(("b",)) is None and cache.get(("a",)) == page(b"aaaa") and len(cache) == 2
    cache.put(("big",), Page(b"x" * 10, b"x"))  # larger than the whole budget: not kept
    assert cache.get(("big",)) is None


def test_row_digests_tell_apart_rows_whose_text_runs_together():
    assert rows_digest([("ab", "c")]) != rows_digest([("a", "bc")])
    assert rows_digest([(1,)]) != rows_digest([("1",)])
    assert rows_digest([(None,)]) != rows_digest([("None",)])
    assert rows_digest([("x",), ("y",)]) == rows_digest([("x",), ("y",)])


def test_a_browser_that_accepts_gzip_gets_the_same_page_compressed(client, actions, db, users):
    import gzip as gzip_module

    from tests.workflow import helpers as h

    study_id = h.make_study(db)
    actions.login("erin")
    plain = client.get(f"/studies/{study_id}")
    packed = client.get(f"/studies/{study_id}", headers={"Accept-Encoding": "gzip, deflate"})
    assert "Content-Encoding" not in plain.headers
    assert packed.headers["Content-Encoding"] == "gzip"
    assert "Accept-Encoding" in packed.headers["Vary"]
    assert gzip_module.decompress(packed.data) == plain.data
    assert packed.headers["Content-Type"] == plain.headers["Content-Type"] == (
        "text/html; charset=utf-8")


def test_tampering_from_outside_the_application_shows_too(app, actions, db, fit_ids, backend):
    """Someone with the database file and the sqlite3 tool, no SQLAlchemy involved: the fit
    page's live digest is rebuilt because SQLite reports that another connection committed."""
    if backend != "sqlite":
        pytest.skip("the sqlite3 tool only opens SQLite files")
    import sqlite3

    _, _, fit_id = fit_ids
    actions.login("erin")
    for _ in range(2):  # the second request is served from the caches
        assert "hash verified" in actions.client.get(f"/fits/{fit_id}").get_data(as_text=True)
    path = app.config["DATABASE_URL"].removeprefix("sqlite:///")
    with sqlite3.connect(path) as raw:
        for (name,) in raw.execute("SELECT name FROM sqlite_master WHERE type = 'trigger' "
                                   "AND tbl_name = 'fits'").fetchall():
            raw.execute(f"DROP TRIGGER {name}")
        raw.execute("UPDATE fits SET software_version = 'edited' WHERE id = ?", (fit_id,))
    raw.close()
    page = actions.client.get(f"/fits/{fit_id}").get_data(as_text=True)
    assert "hash does not match" in page and "hash verified" not in page
