"""Study teams through the JSON API: list, add and remove the engineers on a study's team.

Errors are JSON ``{error, status, field}``: 404 for a study the caller may not read (as for one
that does not exist) and for a user name not on the team, 403 when the caller is neither the
study's owner nor an admin, 409 for someone already on the team, 400 naming the field.
"""

from __future__ import annotations

from typing import Any

from flask import Blueprint, g, jsonify, url_for

from app.store.db import get_session
from app.web.access import SIGNED_IN, allow
from app.web.common import me, team_step
from app.web.openapi import document, id_parameter, json_body, ref, schema
from app.workflow import teams

bp = Blueprint("api_teams", __name__, url_prefix="/api/v1")

TIME = {"type": "string", "format": "date-time"}
schema("TeamMemberCreate", {
    "type": "object", "additionalProperties": False, "required": ["username"],
    "properties": {
        "username": {"type": "string", "minLength": 1,
                     "description": "An active user with the engineer role"},
        "role": {"type": "string", "enum": ["engineer"],
                 "description": "The member's part in the study (engineer, the only one now)"},
    },
    "examples": [{"username": "erin", "role": "engineer"}],
})
schema("TeamMember", {
    "type": "object", "required": ["user", "role", "added_at", "added_by"],
    "properties": {
        "user": ref("UserRef"),
        "role": {"type": "string", "enum": ["owner", "engineer"],
                 "description": "owner: the study's owner, always on the team"},
        "added_at": {**TIME, "description": "For the owner: when the study was created"},
        "added_by": {"anyOf": [ref("UserRef"), {"type": "null"}]},
    },
})
schema("Team", {
    "type": "object", "required": ["study_id", "members"],
    "properties": {"study_id": {"type": "integer"},
                   "members": {"type": "array", "items": ref("TeamMember"),
                               "description": "The owner first, then in the order added"}},
})
USERNAME = {"name": "username", "in": "path", "required": True,
            "schema": {"type": "string", "minLength": 1}}


def _when(moment) -> str | None:
    return None if moment is None else moment.strftime("%Y-%m-%dT%H:%M:%S.%fZ")


def _user(user) -> dict[str, Any] | None:
    if user is None:
        return None
    return {"id": user.id, "username": user.username, "full_name": user.full_name}


def _member(entry: dict[str, Any]) -> dict[str, Any]:
    return {"user": _user(entry["user"]), "role": entry["role"],
            "added_at": _when(entry["added_at"]), "added_by": _user(entry["added_by"])}


def _team(session, study) -> dict[str, Any]:
    return {"study_id": study.id, "members": [_member(m) for m in teams.team(session, study)]}


@bp.route("/studies/<int:study_id>/members")
@allow(SIGNED_IN)
@document("GET", "/studies/{study_id}/members", "A study's team", tags=("Studies",),
          responses={200: ("The owner and the engineers on the team", ref("Team"))})
def list_members(study_id: int):
    """Anyone who may read the study may read its team."""
    session = get_session()
    return jsonify(_team(session, teams.study_for(session, g.user, study_id)))


@bp.route("/studies/<int:study_id>/members", methods=["POST"])
@allow("engineer", "admin")
@document("POST", "/studies/{study_id}/members", "Add an engineer to a study's team",
          request_schema="TeamMemberCreate", tags=("Studies",),
          responses={201: ("The new team member", ref("TeamMember")),
                     409: ("The user is already on the team", ref("Error")),
                     # werkzeug matches the method before the id's range: a study id above
                     # 2**31 - 1 finds the GET rule of this path and answers 405, not 404.
                     405: ("A study id above 2147483647 (no study has one)", ref("Error"))})
def add_member(study_id: int):
    """Only the study's owner or an admin; the change and every refusal for want of that
    authority are recorded in the audit trail."""
    body = json_body("TeamMemberCreate")

    def act(s):
        study = teams.study_for(s, me(s), study_id)
        member = teams.add_member(s, me(s), study, body["username"],
                                  body.get("role", "engineer"))
        return _member({"user": member.user, "role": member.role,
                        "added_at": member.added_at, "added_by": member.added_by})

    out = team_step(study_id, "add a team member", act)
    response = jsonify(out)
    response.status_code = 201
    response.headers["Location"] = url_for("api_teams.list_members", study_id=study_id)
    return response


@bp.route("/studies/<int:study_id>/members/<username>", methods=["DELETE"])
@allow("engineer", "admin")
@document("DELETE", "/studies/{study_id}/members/{username}",
          "Take an engineer off a study's team", tags=("Studies",),
          parameters=(id_parameter("study_id"), USERNAME),
          responses={200: ("The team as it is now", ref("Team")),
                     400: ("The owner cannot be taken off the team, or a browser session "
                           "sent no `X-CSRF-Token` header", ref("Error"))})
def remove_member(study_id: int, username: str):
    """Only the study's owner or an admin; the owner stays on the team. 404 when the user is
    not on the team."""
    def act(s):
        study = teams.study_for(s, me(s), study_id)
        teams.remove_member(s, me(s), study, username)
        return _team(s, study)

    return jsonify(team_step(study_id, "remove a team member", act))
