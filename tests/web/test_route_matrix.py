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
