"""Role × route matrix, generated from the app's URL map.

POLICY is written by hand: it is the access rule each route is meant to have. A route added to
the app without an entry fails ``test_every_route_has_a_policy``; a view whose declared roles
differ from POLICY fails the matrix. Each feature area keeps its own entries in
``tests/web/policies/<area>.py`` (a dict named POLICY); they are merged here.
"""

from __future__ import annotations

import importlib
import pkgutil
import re

import pytest
from werkzeug.routing import IntegerConverter

from tests.conftest import Actions
from tests.web import policies

ANON = "anonymous"
ROLES = ("engineer", "approver", "auditor", "admin")
USER_OF = {"engineer": "erin", "approver": "abel", "auditor": "otto", "admin": "root"}
PUBLIC = "public"
ANY = "signed-in"

POLICY: dict[str, set[str] | str] = {
    "auth.login": PUBLIC,
    "auth.home": PUBLIC,
    "auth.healthz": PUBLIC,
    "auth.logout": ANY,
    "account.page": ANY,
    "account.create_token": ANY,
    "account.revoke_token": ANY,
    "account.change_password": ANY,
    "admin.users": {"admin"},
    "admin.add_user": {"admin"},
    "admin.set_roles": {"admin"},
    "admin.set_active": {"admin"},
    "admin.unlock": {"admin"},
    "studies.index": ANY,
    "studies.create": {"engineer"},
    "studies.view": ANY,
    "studies.thresholds": {"engineer"},
    "data.upload_form": {"engineer"},
    "data.upload": {"engineer"},
    "data.preview": {"engineer"},
    "data.confirm": {"engineer"},
    "data.view": ANY,
    "data.original": ANY,
    "data.canonical": ANY,
    "data.differences_csv": ANY,
}
for _module in pkgutil.iter_modules(policies.__path__):
    POLICY.update(importlib.import_module(f"{policies.__name__}.{_module.name}").POLICY)


def _rules(app):
    for rule in app.url_map.iter_rules():
        if rule.endpoint == "static":
            continue
        for method in sorted(rule.methods - {"HEAD", "OPTIONS"}):
            yield rule, method


def _url(rule) -> str:
    values = {}
    for arg in rule.arguments:
        conv = rule._converters[arg]
        values[arg] = 999999 if isinstance(conv, IntegerConverter) else "nobody-xyz"
    return re.sub(r"<(?:[^:>]+:)?([^>]+)>", lambda m: str(values[m.group(1)]), rule.rule)


def test_every_route_has_a_policy(app):
    endpoints = {rule.endpoint for rule, _ in _rules(app)}
    missing = sorted(endpoints - POLICY.keys())
    assert not missing, f"routes without an entry in POLICY: {missing}"
    stale = sorted(POLICY.keys() - endpoints)
    assert not stale, f"POLICY names routes that no longer exist: {stale}"


def _allowed(policy, who: str) -> bool:
    if policy == PUBLIC:
        return True
    if who == ANON:
        return False
    return policy == ANY or who in policy


@pytest.mark.parametrize("who", (ANON,) + ROLES)
def test_role_route_matrix(app, users, who):
    client = app.test_client()
    actions = Actions(client)
    token = actions.csrf()
    if who != ANON:
        assert actions.login(USER_OF[who]).status_code == 302
        token = actions.csrf()
    failures = []
    for rule, method in _rules(app):
        if rule.endpoint == "auth.logout":
            continue  # would end the session the rest of the matrix uses
        policy = POLICY[rule.endpoint]
        url = _url(rule)
        headers = {"X-CSRF-Token": token}
        response = client.open(url, method=method, headers=headers, data={"csrf_token": token})
        status = response.status_code
        allowed = _allowed(policy, who)
        # A public route may still answer 401 for wrong credentials (the login form itself).
        refused = (403,) if policy == PUBLIC else (401, 403)
        if allowed and status in refused:
            failures.append(f"{method} {url}: {who} should pass, got {status}")
        elif not allowed:
            expected = (401, 302) if who == ANON else (403,)
            if status not in expected:
                failures.append(f"{method} {url}: {who} should be refused, got {status}")
            if who == ANON and status == 302 and "/login" not in response.headers["Location"]:
                failures.append(f"{method} {url}: anonymous redirect goes elsewhere")
        if status >= 500:
            failures.append(f"{method} {url}: {who} got {status}")
    assert not failures, "\n".join(failures)


# ---- the membership dimension --------------------------------------------------------------
# Every route that names a study, fit, data version or setpoint proposal (in its address, or
# in the query or body for the few listed below) is tried on one real study of erin's by an
# engineer on its team (mia) and one who is not (nina). The outsider gets 404 wherever the
# engineer role would pass (the same answer as for a missing row) and the role's 403 elsewhere;
# the member is never refused for the study's sake.
SCOPED_ARGS = ("study_id", "fit_id", "version_id", "proposal_id")
# Ids carried outside the address: the query string, or the JSON body.
QUERY_IDS = {"fits.compare": "?a={fit_id}&b={fit_id}"}
JSON_IDS = {"api_setpoints.create": lambda ids: {"fits": [ids["fit_id"]],
                                                 "goals": {"Hardness": {"goal": "maximize"}}},
            "api_teams.add_member": lambda ids: {"username": "nina"}}
# Refused to a member who is not the owner (nor an admin): team changes and thresholds. A page
# answers with the study page and the refusal (302), the API with 403.
OWNER_ONLY = {"studies.thresholds", "studies.add_member", "studies.remove_member",
              "api_teams.add_member", "api_teams.remove_member"}
# A 404 about something else than the study: a staged upload's token that does not exist, the
# differences of a study's first data version (there is no earlier one).
OTHER_404 = {"data.preview", "data.confirm", "data.differences_csv"}


@pytest.fixture
def erins_study(db, users):
    from app.workflow import accounts, fits, setpoints
    from tests.conftest import PASSWORD
    from tests.workflow import helpers as h

    with db.transaction() as s:
        for username in ("mia", "nina"):
            accounts.create_user(s, None, username=username, full_name=username.title(),
                                 roles="engineer", password=PASSWORD)
    study_id, version_id, fit_id = h.approved_fit(db)
    h.join(db, study_id, "mia")
    with db.transaction() as s:
        proposal_id = setpoints.propose(s, h.user(s, "erin"), [fits.get_fit(s, fit_id)],
                                        {"Hardness": {"goal": "maximize"}}, None, None).id
    return {"study_id": study_id, "version_id": version_id, "fit_id": fit_id,
            "proposal_id": proposal_id}


def _scoped(app):
    for rule, method in _rules(app):
        if (set(SCOPED_ARGS) & set(rule.arguments) or rule.endpoint in QUERY_IDS
                or rule.endpoint in JSON_IDS):
            yield rule, method


def _real_url(rule, ids) -> str:
    url = re.sub(r"<(?:[^:>]+:)?([^>]+)>",
                 lambda m: str(ids.get(m.group(1), "nobody-xyz")), rule.rule)
    return url + QUERY_IDS.get(rule.endpoint, "").format(**ids)


def test_every_scoped_route_is_in_the_membership_matrix(app):
    endpoints = {rule.endpoint for rule, _ in _scoped(app)}
    # A sample of what must be there: pages, downloads, API reads and writes, team routes.
    assert {"studies.view", "data.original", "fits.charts_json", "fits.compare",
            "reviews.review", "history.package", "setpoints.export_csv", "api.get_study",
            "api.upload_data", "api_reviews.submit", "api_setpoints.create",
            "api_teams.list_members", "studies.thresholds"} <= endpoints


@pytest.mark.parametrize("who", ("nina", "mia"))
def test_membership_route_matrix(app, erins_study, who):
    client = app.test_client()
    actions = Actions(client)
    assert actions.login(who).status_code == 302
    token = actions.csrf()
    failures, tried = [], 0
    for rule, method in _scoped(app):
        if rule.endpoint == "auth.logout":
            continue
        url = _real_url(rule, erins_study)
        headers = {"X-CSRF-Token": token}
        if rule.endpoint in JSON_IDS:
            response = client.open(url, method=method, headers=headers,
                                   json=JSON_IDS[rule.endpoint](erins_study))
        else:
            response = client.open(url, method=method, headers=headers,
                                   data={"csrf_token": token})
        status, tried = response.status_code, tried + 1
        engineer_may = _allowed(POLICY[rule.endpoint], "engineer")
        if status >= 500:
            failures.append(f"{method} {url}: {who} got {status}")
        elif not engineer_may:
            if status != 403:
                failures.append(f"{method} {url}: the engineer role is refused, got {status}")
        elif who == "nina":
            if status != 404:
                failures.append(f"{method} {url}: an outsider should get 404, got {status}")
        elif rule.endpoint in OWNER_ONLY:
            if status not in (302, 403):
                failures.append(f"{method} {url}: only the owner may, got {status}")
        elif status == 403 or (status == 404 and rule.endpoint not in OTHER_404):
            failures.append(f"{method} {url}: a member should pass, got {status}")
    assert tried > 40
    assert not failures, "\n".join(failures)
