"""The JSON API under /api/v1: a fit round-trips with a bearer token; refusals name the field."""

from __future__ import annotations

import hashlib
import io
import itertools
import json
import re
import uuid

import pytest
from click.testing import CliRunner
from jsonschema import Draft202012Validator
from sqlalchemy import func, select

from app import cli as app_cli
from app import create_app
from app.analysis import Thresholds
from app.analysis.boxcox import LAMBDA_RANGE
from app.demo_data import rsm_study
from app.ingest import read_upload, validate
from app.store.audit import canonical_json
from app.store.db import database
from app.store.models import ApiToken, AuditEvent, DataVersion, Fit, Study, User
from app.web.common import ID_MAX
from app.web.openapi import API_PREFIX
from app.workflow import accounts, fits, studies, uploads
from tests.conftest import TEST_ARGON2

DEMO = rsm_study()
ROLES_JSON = json.dumps({name: role.to_dict() for name, role in DEMO.roles.items()})


def _user(s, username: str) -> User:
    return s.scalar(select(User).where(User.username == username))


def service_token(db, username: str) -> str:
    with db.transaction() as s:
        _row, raw = accounts.create_token(s, None, _user(s, username), "tests")
    return raw


def cli_token(app, monkeypatch, username: str) -> str:
    """A token made by `plumbline tokens create USERNAME` against the test app's database."""
    env = {"PLUMBLINE_DATABASE_URL": app.config["DATABASE_URL"],
           "PLUMBLINE_INSTANCE_PATH": app.instance_path,
           "PLUMBLINE_SECRET_KEY": "cli-test-" + uuid.uuid4().hex}
    made = []

    def recording_app():
        made.append(create_app())  # configured from env, exactly as the command does
        return made[-1]

    # Only to dispose the command's engine afterwards: an open PostgreSQL connection left to
    # the garbage collector raises a ResourceWarning.
    monkeypatch.setattr(app_cli, "_app", recording_app)
    try:
        result = CliRunner().invoke(app_cli.main, ["tokens", "create", username, "--name", "ci"],
                                    env=env, catch_exceptions=False)
    finally:
        for command_app in made:
            database(command_app).dispose()
    assert len(made) == 1
    assert result.exit_code == 0, result.output
    raw = result.stdout.strip().splitlines()[-1]
    assert raw.startswith(accounts.TOKEN_PREFIX)
    return raw


def bearer(raw: str) -> dict[str, str]:
    return {"Authorization": f"Bearer {raw}"}


def upload(client, headers, study_id: int, *, data: bytes = DEMO.csv_bytes,
           roles: str | None = ROLES_JSON, filename: str = DEMO.filename, **fields):
    form = {"file": (io.BytesIO(data), filename), **fields}
    if roles is not None:
        form["roles"] = roles
    return client.post(f"{API_PREFIX}/studies/{study_id}/data", data=form, headers=headers,
                       content_type="multipart/form-data")


def counts(db) -> dict[str, int]:
    with db.session(write=False) as s:
        return {model.__tablename__: s.scalar(select(func.count()).select_from(model))
                for model in (Study, DataVersion, Fit, AuditEvent)}


def schema_validator(client, headers, name: str) -> Draft202012Validator:
    """A validator for one component schema of the served OpenAPI document."""
    doc = client.get(f"{API_PREFIX}/openapi.json", headers=headers).get_json()
    return Draft202012Validator({"$ref": f"#/components/schemas/{name}",
                                 "components": doc["components"]})


@pytest.fixture
def version_id(db, users) -> int:
    """The demo data stored through the services, for tests about fits."""
    with db.transaction() as s:
        erin = _user(s, "erin")
        study = studies.create_study(s, erin, title=DEMO.title)
        raw = read_upload(DEMO.csv_bytes, DEMO.filename)
        return uploads.add_data_version(s, erin, study, data=DEMO.csv_bytes,
                                        filename=DEMO.filename, raw=raw,
                                        table=validate(raw, DEMO.roles)).id


# ---- the round trip -----------------------------------------------------------------------

@pytest.mark.parametrize("source", ["service", "cli"])
def test_fit_round_trips_through_the_api(app, db, users, client, monkeypatch, source):
    raw = service_token(db, "erin") if source == "service" else cli_token(app, monkeypatch,
                                                                           "erin")
    auth = bearer(raw)

    made = client.post(f"{API_PREFIX}/studies", json={"title": DEMO.title,
                                                      "purpose": DEMO.purpose,
                                                      "review_below": 0.1}, headers=auth)
    assert made.status_code == 201, made.get_json()
    study_id = made.get_json()["id"]
    assert made.headers["Location"] == f"{API_PREFIX}/studies/{study_id}"
    assert made.get_json()["owner"]["username"] == "erin"

    sent = upload(client, auth, study_id)
    assert sent.status_code == 201, sent.get_json()
    version = sent.get_json()
    assert sent.headers["Location"] == f"{API_PREFIX}/data/{version['id']}"
    assert version["n_rows"] == 20
    assert version["original_sha256"] == hashlib.sha256(DEMO.csv_bytes).hexdigest()
    assert version["roles"]["Cure temperature"] == {"role": "factor", "units": "°C",
                                                    "low": 150.0, "high": 170.0, "kind": None}

    reason = "panel scratched before measurement"
    fitted = client.post(f"{API_PREFIX}/data/{version['id']}/fits", headers=auth, json={
        "response": "Hardness", "model": "quadratic", "exclusions": [{"row": 3,
                                                                      "reason": reason}]})
    assert fitted.status_code == 201, fitted.get_json()
    fit_id = fitted.get_json()["id"]
    assert fitted.headers["Location"] == f"{API_PREFIX}/fits/{fit_id}"

    got = client.get(f"{API_PREFIX}/fits/{fit_id}", headers=auth)
    assert got.status_code == 200
    body = got.get_json()
    with db.session(write=False) as s:
        stored = s.get(Fit, fit_id)
        assert body["snapshot_sha256"] == fits.snapshot_sha256(stored) == stored.snapshot_sha256
        assert body["results"] == fits.results_of(stored)
    # A client can recompute the hash from the API's answers alone.
    snapshot = {"data_version_id": version["id"],
                "data_canonical_sha256": version["canonical_sha256"], "spec": body["spec"],
                "results": body["results"], "thresholds": body["thresholds"],
                "software_version": body["software_version"]}
    assert hashlib.sha256(canonical_json(snapshot).encode()).hexdigest() == body[
        "snapshot_sha256"]
    assert body["snapshot_intact"] is True
    assert body["state"] == "draft" and body["signatures"] == []
    assert body["created_by"]["username"] == "erin"
    assert (body["study_id"], body["data_version_id"]) == (study_id, version["id"])
    assert body["thresholds"] == {"review": 0.1, "fail": 0.01}  # the study's own thresholds
    # The document names the per-run table's hash and links to its pages and its CSV.
    assert body["results"]["runs"]["n"] == body["runs"]["n"] == 20
    page = client.get(body["runs"]["runs"], headers=auth).get_json()
    assert page["total"] == 20 and page["next"] is None and len(page["runs"]) == 20
    excluded = [(r["row"], r["excluded"], r["exclusion_reason"]) for r in page["runs"]
                if r["excluded"]]
    assert excluded == [(3, True, reason)]
    assert body["runs"]["excluded"] == 1
    assert body["spec"]["exclusions"] == [[3, reason]]
    # Full quadratic in three factors: 3 main effects, 3 two-factor interactions, 3 squares
    # (the order of names inside an interaction follows the stored roles, so compare as sets).
    factors = {"Cure temperature", "Cure time", "Catalyst"}
    terms = [frozenset(t.split(":")) for t in body["results"]["terms"]]
    assert sorted(map(sorted, terms)) == sorted(
        [[f] for f in factors] + [[f"{f}^2"] for f in factors]
        + [sorted(pair) for pair in itertools.combinations(factors, 2)])
    assert {c["id"] for c in body["results"]["checks"]} >= {"normality", "lack_of_fit"}

    detail = client.get(f"{API_PREFIX}/studies/{study_id}", headers=auth).get_json()
    assert [v["id"] for v in detail["data_versions"]] == [version["id"]]
    assert [(f["id"], f["state"]) for f in detail["fits"]] == [(fit_id, "draft")]
    listed = client.get(f"{API_PREFIX}/data/{version['id']}", headers=auth).get_json()
    assert [f["id"] for f in listed["fits"]] == [fit_id]
    assert study_id in [s["id"] for s in client.get(f"{API_PREFIX}/studies",
                                                    headers=auth).get_json()["studies"]]

    # What was served matches what the OpenAPI document says.
    for name, value in (("Fit", body), ("StudyDetail", detail), ("DataVersion", listed),
                        ("Study", made.get_json())):
        errors = list(schema_validator(client, auth, name).iter_errors(value))
        assert not errors, f"{name}: {errors[0].message}"


def test_exclusions_as_a_mapping(client, db, version_id):
    auth = bearer(service_token(db, "erin"))
    fitted = client.post(f"{API_PREFIX}/data/{version_id}/fits", headers=auth, json={
        "response": "Gloss", "terms": ["Cure temperature", "Catalyst"],
        "exclusions": {"7": "gloss meter not zeroed"}})
    assert fitted.status_code == 201, fitted.get_json()
    body = fitted.get_json()
    page = client.get(body["runs"]["runs"], headers=auth).get_json()
    assert [r["row"] for r in page["runs"] if r["excluded"]] == [7]
    assert body["spec"]["model"] is None


# ---- who may call ---------------------------------------------------------------------------

def test_revoked_token_is_refused(client, db, users):
    raw = service_token(db, "erin")
    assert client.get(f"{API_PREFIX}/studies", headers=bearer(raw)).status_code == 200
    with db.transaction() as s:
        row = s.scalar(select(ApiToken).where(ApiToken.token_sha256 == accounts.sha256_hex(raw)))
        accounts.revoke_token(s, _user(s, "erin"), row.id)
    refused = client.get(f"{API_PREFIX}/studies", headers=bearer(raw))
    assert refused.status_code == 401
    assert refused.get_json()["status"] == 401 and "token" in refused.get_json()["error"]


def test_deactivated_users_token_is_refused(client, db, users):
    raw = service_token(db, "erin")
    assert client.get(f"{API_PREFIX}/studies", headers=bearer(raw)).status_code == 200
    with db.transaction() as s:
        accounts.set_active(s, None, "erin", False)
    assert client.get(f"{API_PREFIX}/studies", headers=bearer(raw)).status_code == 401


def test_inactive_user_is_refused_even_with_an_unrevoked_token(client, db, users):
    raw = service_token(db, "abel")
    with db.transaction() as s:
        _user(s, "abel").active = False  # bypasses set_active, which would revoke the token
    assert client.get(f"{API_PREFIX}/studies", headers=bearer(raw)).status_code == 401


def test_auditor_token_reads_but_cannot_write(client, db, version_id):
    auth = bearer(service_token(db, "otto"))
    with db.session(write=False) as s:
        study_id = s.get(DataVersion, version_id).study_id
    before = counts(db)
    assert client.get(f"{API_PREFIX}/studies/{study_id}", headers=auth).status_code == 200
    refused = [
        client.post(f"{API_PREFIX}/studies", json={"title": "Not mine"}, headers=auth),
        upload(client, auth, study_id, reason="second copy"),
        client.post(f"{API_PREFIX}/data/{version_id}/fits", json={"response": "Hardness"},
                    headers=auth),
    ]
    assert [r.status_code for r in refused] == [403, 403, 403]
    assert all("engineer" in r.get_json()["error"] for r in refused)
    assert counts(db) == before


def test_openapi_document_needs_sign_in(client, db, users):
    refused = client.get(f"{API_PREFIX}/openapi.json")
    assert refused.status_code == 401 and refused.get_json()["status"] == 401
    auth = bearer(service_token(db, "otto"))
    assert client.get(f"{API_PREFIX}/openapi.json", headers=auth).status_code == 200


def test_cookie_session_needs_csrf_header_but_token_does_not(app, db, users, actions):
    assert actions.login("erin").status_code == 302
    missing = actions.client.post(f"{API_PREFIX}/studies", json={"title": "Cookie study"})
    assert missing.status_code == 400
    assert "security token" in missing.get_json()["error"]
    assert counts(db)["studies"] == 0
    with_header = actions.client.post(f"{API_PREFIX}/studies", json={"title": "Cookie study"},
                                      headers={"X-CSRF-Token": actions.csrf()})
    assert with_header.status_code == 201

    token_client = app.test_client()
    by_token = token_client.post(f"{API_PREFIX}/studies", json={"title": "Token study"},
                                 headers=bearer(service_token(db, "erin")))
    assert by_token.status_code == 201
    assert counts(db)["studies"] == 2


def test_unauthenticated_post_is_401_before_csrf_or_body(client, db, users):
    """Without credentials an API route answers 401 whatever else is wrong with the request."""
    before = counts(db)
    answers = [
        client.post(f"{API_PREFIX}/studies", json={"title": "No token"}),
        client.post(f"{API_PREFIX}/studies", data="not json", content_type="text/plain"),
        client.post(f"{API_PREFIX}/studies/1/data", data={"roles": "{"}),
        client.post(f"{API_PREFIX}/fits/1/submit"),
        client.post(f"{API_PREFIX}/setpoints", json={"fits": []},
                    headers=bearer("plb_no-such-token")),
    ]
    for answer in answers:
        assert answer.status_code == 401, answer.get_json()
        assert answer.get_json()["status"] == 401 and "token" in answer.get_json()["error"]
        assert answer.headers["WWW-Authenticate"].startswith("Bearer ")
    assert counts(db) == before


def test_pages_still_check_csrf_first(client):
    refused = client.post("/data/1/fit", data={"response": "Hardness"})
    assert refused.status_code == 400 and "security token" in refused.get_data(as_text=True)


def test_ids_out_of_range_are_404(client, db, users):
    """Beyond 64 bits (SQLite's limit) or 32 bits (PostgreSQL's INTEGER): 404, never a 500."""
    auth = bearer(service_token(db, "otto"))
    huge = "99999999999999999999999"
    for path in (f"/fits/{huge}", f"/studies/{huge}", f"/data/{huge}", f"/setpoints/{huge}",
                 f"/setpoints/{huge}/export", f"/fits/{2**63}", f"/fits/{ID_MAX + 1}"):
        answer = client.get(API_PREFIX + path, headers=auth)
        assert answer.status_code == 404, (path, answer.status_code)
        assert answer.get_json()["status"] == 404
    largest = client.get(f"{API_PREFIX}/fits/{ID_MAX}", headers=auth)
    assert largest.status_code == 404 and largest.get_json()["field"] == "fit"
    posted = client.post(f"{API_PREFIX}/data/{huge}/fits", json={"response": "Hardness"},
                         headers=bearer(service_token(db, "erin")))
    assert posted.status_code == 404 and posted.is_json
    assert client.get(f"/fits/{huge}", headers=auth).status_code == 404  # pages too


def test_fit_ids_out_of_range_in_a_body_are_refused(client, db, users):
    auth = bearer(service_token(db, "erin"))
    for fit_id in (2**64, ID_MAX + 1, 0):
        refused = client.post(f"{API_PREFIX}/setpoints", headers=auth, json={
            "fits": [fit_id], "goals": {"Hardness": {"goal": "maximize"}}})
        assert refused.status_code == 400 and refused.get_json()["field"] == "fits[0]"


def test_405_carries_allow(client, db, users):
    auth = bearer(service_token(db, "otto"))
    for headers in (auth, {}):
        answer = client.delete(f"{API_PREFIX}/studies", headers=headers)
        assert answer.status_code == 405 and answer.get_json()["status"] == 405
        assert {m.strip() for m in answer.headers["Allow"].split(",")} >= {"GET", "POST"}
    fit = client.open(f"{API_PREFIX}/fits/1", method="TRACE", headers=auth)
    assert fit.status_code == 405 and "GET" in fit.headers["Allow"]
    assert "POST" not in fit.headers["Allow"]
    page = client.put("/login")
    assert page.status_code == 405 and not page.is_json
    assert {"GET", "POST"} <= {m.strip() for m in page.headers["Allow"].split(",")}


# ---- refusals name the field ----------------------------------------------------------------

def _study_id(client, auth) -> int:
    made = client.post(f"{API_PREFIX}/studies", json={"title": "Upload checks"}, headers=auth)
    assert made.status_code == 201
    return made.get_json()["id"]


BAD_ROLES = [
    (None, "roles", "is required"),
    ("{not json", "roles", "not valid JSON"),
    ('["factor"]', "roles", "must be an object"),
    (json.dumps({"Cure temperature": {"role": "factor", "low": "150", "high": 170}}),
     "roles.Cure temperature.low", "must be a number or null, not text"),
    (json.dumps({"Catalyst": {"role": "factr"}}), "roles.Catalyst.role", "must be one of"),
    (json.dumps({"Catalyst": {"role": "factor", "lo": 0.8}}), "roles.Catalyst.lo",
     "is not known"),
    (json.dumps({"Catalyst": {"units": "%"}}), "roles.Catalyst.role", "is required"),
]


def refusals(responses, status: int, cases) -> list[str]:
    """Cases whose answer is not ``status`` with the expected field and words in the message."""
    failures = []
    for response, (case, field, words) in zip(responses, cases, strict=True):
        body = response.get_json() or {}
        if (response.status_code, body.get("field")) != (status, field) or words not in body.get(
                "error", ""):
            failures.append(f"{case!r}: expected {status} field {field!r} with {words!r}, got "
                            f"{response.status_code} {body}")
    return failures


def test_bad_roles_name_the_field(client, db, users):
    auth = bearer(service_token(db, "erin"))
    study_id = _study_id(client, auth)
    before = counts(db)
    answers = [upload(client, auth, study_id, roles=roles) for roles, _f, _w in BAD_ROLES]
    assert not refusals(answers, 400, BAD_ROLES)
    assert all(f"'{field}'" in a.get_json()["error"] for a, (_r, field, _w) in zip(
        answers, BAD_ROLES, strict=True))
    assert counts(db) == before


def test_bad_file_names_row_and_column_and_stores_nothing(client, db, users):
    auth = bearer(service_token(db, "erin"))
    study_id = _study_id(client, auth)
    before = counts(db)
    # Data row 4 is the fifth line: header first.
    lines = DEMO.csv_bytes.decode().splitlines()
    cells = lines[4].split(",")
    cells[5] = "soft"  # Hardness
    lines[4] = ",".join(cells)
    refused = upload(client, auth, study_id, data=("\n".join(lines) + "\n").encode())
    assert refused.status_code == 400
    body = refused.get_json()
    assert body["field"] == "file"
    assert {"row": 4, "column": "Hardness"}.items() <= next(
        p for p in body["problems"] if p["column"] == "Hardness").items()
    assert "soft" in body["error"]
    assert counts(db) == before


def test_unreadable_file_stores_nothing(client, db, users):
    auth = bearer(service_token(db, "erin"))
    study_id = _study_id(client, auth)
    before = counts(db)
    refused = upload(client, auth, study_id, data=b"", filename="empty.csv")
    assert refused.status_code == 400
    assert "empty" in refused.get_json()["problems"][0]["message"]
    assert counts(db) == before


def test_second_version_needs_a_reason(client, db, users):
    auth = bearer(service_token(db, "erin"))
    study_id = _study_id(client, auth)
    assert upload(client, auth, study_id).status_code == 201
    refused = upload(client, auth, study_id)
    assert refused.status_code == 400 and refused.get_json()["field"] == "reason"
    assert upload(client, auth, study_id, reason="row 4 retyped from the log").status_code == 201


def test_upload_must_be_multipart(client, db, users):
    auth = bearer(service_token(db, "erin"))
    refused = client.post(f"{API_PREFIX}/studies/{_study_id(client, auth)}/data",
                          json={"file": "x"}, headers=auth)
    assert refused.status_code == 415 and refused.get_json()["field"] == "Content-Type"


@pytest.fixture
def small_app(app):
    """A second app on the same database with a 500-byte upload limit."""
    small = create_app({"TESTING": True, "DATABASE_URL": app.config["DATABASE_URL"],
                        "SECRET_KEY": "test-only-" + uuid.uuid4().hex, "SOFTWARE_VERSION": "test",
                        "MAX_UPLOAD_BYTES": 500, **TEST_ARGON2})
    small.instance_path = app.instance_path
    assert small.config["MAX_CONTENT_LENGTH"] == 500 + 1_000_000
    yield small
    database(small).dispose()


def test_upload_over_the_limit_is_413(small_app, db, users):
    client = small_app.test_client()
    auth = bearer(service_token(db, "erin"))
    study_id = _study_id(client, auth)
    before = counts(db)
    assert len(DEMO.csv_bytes) > 500
    refused = upload(client, auth, study_id)
    assert refused.status_code == 413
    body = refused.get_json()
    assert body["field"] == "file" and "limit is 500 bytes" in body["problems"][0]["message"]
    # Over MAX_CONTENT_LENGTH too: refused while the request is read. The body is encoded
    # here because the test client spools a large multipart body to a file it never closes.
    boundary = "plumbline-test-boundary"
    body = (f"--{boundary}\r\nContent-Disposition: form-data; name=\"file\"; "
            f"filename=\"big.csv\"\r\n\r\n").encode() + b"x" * 1_100_000 + (
        f"\r\n--{boundary}--\r\n").encode()
    huge = client.post(f"{API_PREFIX}/studies/{study_id}/data", data=body, headers=auth,
                       content_type=f"multipart/form-data; boundary={boundary}")
    assert huge.status_code == 413
    assert huge.get_json()["field"] == "file" and "limit" in huge.get_json()["error"]
    assert counts(db) == before


LAMBDA_WORDS = f"must lie between {LAMBDA_RANGE[0]} and {LAMBDA_RANGE[1]}"
BAD_FITS = [
    ({"response": "Hardness", "colour": "red"}, "colour", "is not known"),
    ({"response": 5}, "response", "must be text, not a whole number"),
    ({"model": "quadratic"}, "response", "is required"),
    ({"response": "Hardness", "model": "cubic"}, "model", "must be one of"),
    ({"response": "Hardness", "hierarchy": "yes"}, "hierarchy", "must be true or false"),
    ({"response": "Hardness", "exclusions": [{"row": 3, "reason": ""}]},
     "exclusions[0].reason", "must not be empty"),
    ({"response": "Hardness", "exclusions": [{"row": "three", "reason": "x"}]},
     "exclusions[0].row", "must be a whole number"),
    ({"response": "Hardness", "exclusions": {"3": 7}}, "exclusions.3", "must be text"),
    ({"response": "Hardness", "exclusions": {"row3": "x"}}, "exclusions.row3", "not an allowed"),
    ({"response": "Hardness", "exclusions": [{"row": 2, "reason": "a"},
                                             {"row": 2, "reason": "b"}]},
     "exclusions", "row 2 more than once"),
    ({"response": "Hardness", "exclusions": {"99": "lost"}}, "exclusions", "99 does not exist"),
    ({"response": "Hardness", "model": "linear", "terms": ["Catalyst"]}, "terms", "not both"),
    ({"response": "Hardness", "model": None}, "model", "is required"),
    ({"response": "Hardness", "reduce_alpha": 1.5}, "reduce_alpha", "strictly between"),
    ({"response": "Hardness", "transform": "boxcox", "boxcox_lambda": 700}, "boxcox_lambda",
     LAMBDA_WORDS),
    ({"response": "Hardness", "transform": "boxcox", "boxcox_lambda": 1e308}, "boxcox_lambda",
     LAMBDA_WORDS),
    ({"response": "Hardness", "transform": "boxcox", "boxcox_lambda": -800}, "boxcox_lambda",
     LAMBDA_WORDS),
    ({"response": "Cure time"}, "response", "not a response"),
    ([1, 2], "body", "must be an object"),
]


def test_bad_fit_requests_name_the_field(client, db, version_id):
    auth = bearer(service_token(db, "erin"))
    before = counts(db)
    answers = [client.post(f"{API_PREFIX}/data/{version_id}/fits", json=payload, headers=auth)
               for payload, _f, _w in BAD_FITS]
    failures = refusals(answers, 400, BAD_FITS)
    assert not failures, "\n".join(failures)
    assert counts(db) == before


def test_json_body_must_be_json(client, db, version_id):
    auth = bearer(service_token(db, "erin"))
    url = f"{API_PREFIX}/data/{version_id}/fits"
    as_form = client.post(url, data={"response": "Hardness"}, headers=auth)
    assert as_form.status_code == 415
    assert "application/json" in as_form.get_json()["error"]
    broken = client.post(url, data='{"response": ', content_type="application/json",
                         headers=auth)
    assert broken.status_code == 400 and broken.get_json()["field"] == "body"
    not_a_number = client.post(url, data='{"response": "Hardness", "boxcox_lambda": NaN}',
                               content_type="application/json", headers=auth)
    assert not_a_number.status_code == 400 and "NaN" in not_a_number.get_json()["error"]
    overflowing = client.post(url, data='{"response": "Hardness", "boxcox_lambda": -1e400}',
                              content_type="application/json", headers=auth)
    assert overflowing.status_code == 400
    assert overflowing.get_json()["field"] == "boxcox_lambda"
    assert LAMBDA_WORDS in overflowing.get_json()["error"]


BAD_STUDIES = [
    ({}, "title", "is required"), ({"title": ""}, "title", "must not be empty"),
    ({"title": "T", "review_below": "high"}, "review_below", "must be a number"),
    ({"title": "T", "review_below": 0.01, "fail_below": 0.05}, "thresholds", "fail below"),
]


def test_bad_study_requests_name_the_field(client, db, users):
    auth = bearer(service_token(db, "erin"))
    answers = [client.post(f"{API_PREFIX}/studies", json=payload, headers=auth)
               for payload, _f, _w in BAD_STUDIES]
    failures = refusals(answers, 400, BAD_STUDIES)
    assert not failures, "\n".join(failures)
    assert counts(db)["studies"] == 0


def test_missing_objects_are_404_json(client, db, users):
    auth = bearer(service_token(db, "otto"))
    cases = [("/studies/999999", "study", "No study 999999"),
             ("/data/999999", "data_version", "No data version 999999"),
             ("/fits/999999", "fit", "No fit 999999")]
    failures = refusals([client.get(API_PREFIX + path, headers=auth) for path, _f, _w in cases],
                        404, cases)
    assert not failures, "\n".join(failures)


def test_fit_of_a_missing_data_version_is_404(client, db, users):
    refused = client.post(f"{API_PREFIX}/data/999999/fits", json={"response": "Hardness"},
                          headers=bearer(service_token(db, "erin")))
    assert refused.status_code == 404 and refused.get_json()["field"] == "data_version"


def test_thresholds_of_the_study_are_used(client, db, version_id):
    with db.transaction() as s:
        study = s.get(DataVersion, version_id).study
        studies.set_thresholds(s, _user(s, "erin"), study, review_below=0.2, fail_below=0.02,
                               reason="stricter for this product")
    fitted = client.post(f"{API_PREFIX}/data/{version_id}/fits", json={"response": "Hardness"},
                         headers=bearer(service_token(db, "erin")))
    assert fitted.status_code == 201
    assert fitted.get_json()["thresholds"] == Thresholds(review=0.2, fail=0.02).to_dict()


# ---- the OpenAPI document -------------------------------------------------------------------

def _api_routes(app) -> set[tuple[str, str]]:
    out = set()
    for rule in app.url_map.iter_rules():
        if not rule.rule.startswith(API_PREFIX + "/"):
            continue
        path = re.sub(r"<(?:[^:>]+:)?([^>]+)>", r"{\1}", rule.rule[len(API_PREFIX):])
        out |= {(m, path) for m in rule.methods - {"HEAD", "OPTIONS"}}
    return out


def test_openapi_lists_every_api_route(app, client, db, users):
    doc = client.get(f"{API_PREFIX}/openapi.json",
                     headers=bearer(service_token(db, "otto"))).get_json()
    documented = {(method.upper(), path) for path, ops in doc["paths"].items() for method in ops}
    routes = _api_routes(app)
    assert ("POST", "/data/{version_id}/fits") in routes  # the URL map was read
    assert routes - documented == set(), "API routes without an OpenAPI operation"
    assert documented - routes == set(), "OpenAPI operations without a route"
    assert doc["info"]["version"] == app.config["SOFTWARE_VERSION"]
    assert doc["components"]["securitySchemes"]["bearerAuth"]["scheme"] == "bearer"
    assert {"Study", "DataVersion", "Fit", "Error"} <= doc["components"]["schemas"].keys()
    assert set(doc["components"]["schemas"]["Error"]["properties"]) >= {"error", "status",
                                                                        "field"}
    # The access shown is the rule enforced (read from @allow).
    for (method, path), policy in {("POST", "/studies"): ["engineer"],
                                   ("GET", "/fits/{fit_id}"): ["signed-in"]}.items():
        assert doc["paths"][path][method.lower()]["x-access"] == policy


def test_openapi_document_is_valid(client, db, users):
    validator = pytest.importorskip("openapi_spec_validator")
    doc = client.get(f"{API_PREFIX}/openapi.json",
                     headers=bearer(service_token(db, "otto"))).get_json()
    validator.validate(doc)


def test_registry_refuses_a_second_view_for_one_operation():
    from app.web import openapi

    def other_view():
        return None

    with pytest.raises(ValueError, match="already documented"):
        openapi.document("GET", "/fits/{fit_id}", "again", responses={200: ("x", None)})(
            other_view)
    with pytest.raises(ValueError, match="relative to /api/v1"):
        openapi.document("GET", "/api/v1/fits", "prefixed", responses={200: ("x", None)})
    assert sum(op.path == "/fits/{fit_id}" for op in openapi.OPERATIONS) == 1


# ---- categorical factors --------------------------------------------------------------------

GLOSS = (b"Machine,Speed,Gloss\n"
         b"M2,10,81.5\nM1,20,84.0\nM3,10,80.2\nM2,20,86.9\nM1,10,79.1\nM3,20,83.3\n"
         b"M2,15,84.4\nM1,15,81.8\nM3,15,82.0\n")
GLOSS_ROLES = json.dumps({"Machine": {"role": "factor", "kind": "categorical"},
                          "Speed": {"role": "factor", "low": 10, "high": 20},
                          "Gloss": {"role": "response"}})


def test_upload_and_fit_with_a_categorical_factor(client, db, users, actions):
    auth = bearer(service_token(db, "erin"))
    study_id = client.post(f"{API_PREFIX}/studies", json={"title": "Gloss"},
                           headers=auth).get_json()["id"]
    sent = upload(client, auth, study_id, data=GLOSS, roles=GLOSS_ROLES, filename="gloss.csv")
    assert sent.status_code == 201, sent.get_json()
    version = sent.get_json()
    assert version["roles"]["Machine"] == {"role": "factor", "kind": "categorical",
                                           "units": None, "low": None, "high": None}
    fitted = client.post(f"{API_PREFIX}/data/{version['id']}/fits", headers=auth,
                         json={"response": "Gloss", "model": "interaction"})
    assert fitted.status_code == 201, fitted.get_json()
    body = client.get(f"{API_PREFIX}/fits/{fitted.get_json()['id']}", headers=auth).get_json()
    rows = {r["source"]: r for r in body["results"]["anova"]}
    assert rows["Machine"]["df"] == 2 and rows["Machine:Speed"]["df"] == 2
    assert "Machine[M2]:Speed" in [c["term"] for c in body["results"]["coefficients"]]
    assert body["spec"]["factors"][0]["levels"] == ["M2", "M1", "M3"]
    errors = list(schema_validator(client, auth, "Fit").iter_errors(body))
    assert not errors, errors[0].message
    # the pages and charts of the fit draw without error
    actions.login("erin")
    fit_id = fitted.get_json()["id"]
    page = client.get(f"/fits/{fit_id}")
    assert page.status_code == 200 and "Machine[M2]" in page.get_data(as_text=True)
    charts = client.get(f"/fits/{fit_id}/charts.json")
    assert charts.status_code == 200
    builder = client.get(f"/data/{version['id']}/fit").get_data(as_text=True)
    assert "Speed^2" in builder and "Machine^2" not in builder


def test_categorical_factor_with_low_and_high_is_refused_naming_the_field(client, db, users):
    auth = bearer(service_token(db, "erin"))
    study_id = client.post(f"{API_PREFIX}/studies", json={"title": "Gloss"},
                           headers=auth).get_json()["id"]
    roles = json.loads(GLOSS_ROLES)
    roles["Machine"].update(low=1, high=3)
    sent = upload(client, auth, study_id, data=GLOSS, roles=json.dumps(roles),
                  filename="gloss.csv")
    assert sent.status_code == 400
    assert "categorical factor has named levels" in json.dumps(sent.get_json())
