"""The API's own description: operations declared beside their views, built into OpenAPI 3.1.

Every view under ``/api/v1`` describes itself with :func:`document`, and reads its JSON body
through :func:`json_body`, which checks the body against the very schema the document shows, so
the description and the behaviour cannot drift apart. ``tests/web/test_api.py`` fails when a
route in the app's URL map has no matching operation here, or an operation has no route.

Adding an endpoint (for example in a sign-off blueprint registered with url_prefix ``/api/v1``)::

    from app.web.openapi import document, json_body, ref, schema

    schema("SignatureCreate", {
        "type": "object", "additionalProperties": False,
        "required": ["meaning", "password"],
        "properties": {"meaning": {"type": "string", "minLength": 1},
                       "password": {"type": "string"},
                       "comment": {"type": "string"}},
    })

    @bp.route("/fits/<int:fit_id>/signatures", methods=["POST"])
    @allow("approver")
    @document("POST", "/fits/{fit_id}/signatures", "Sign a submitted fit",
              request_schema="SignatureCreate",
              responses={201: ("The signature", ref("Signature"))}, tags=("Sign-off",))
    def sign(fit_id: int):
        body = json_body("SignatureCreate")   # 415 / 400 naming the field, before any work
        ...

Rules of the registry:

- ``path`` is relative to :data:`API_PREFIX`, in OpenAPI form (``{fit_id}``, not
  ``<int:fit_id>``); path parameters are ids (integers 1 to :data:`ID_MAX`, see
  :func:`id_parameter`) unless ``parameters=`` says otherwise.
- The access rule shown is read from the view's ``@allow(...)`` at build time, so it is the rule
  enforced, never a copy of it. Every status the app itself answers is listed with the Error
  body: 401 (with ``WWW-Authenticate``) and 403 for non-public views, 404 for paths with
  parameters, 400 for every POST (a browser session without its CSRF header), 400, 413 and 415
  for views with a request body; a ``Location`` header is shown for every 201. Declare in
  ``responses`` any other status the view answers (409 from a service, 404 for an id in the
  body, 400 for a query parameter): ``tests/web/test_openapi_conformance.py`` fails on a
  status, media type, header or body the document does not show.
- ``request_schema`` and response schemas are a schema dict, or the name of a schema registered
  with :func:`schema` (shown as a ``$ref``); a response offered in several media types is a
  :class:`Media`. Register each schema name once.
- :func:`json_body` understands the subset of JSON Schema used here: ``type`` (one or a list),
  ``properties``, ``required``, ``additionalProperties`` (False or a schema), ``propertyNames``
  with ``pattern``, ``items``, ``enum``, ``minLength``, ``minItems``, ``minimum``, ``maximum``,
  ``exclusiveMinimum`` with ``exclusiveMaximum`` (both), and ``$ref`` to registered schemas.
  Keep request schemas within it (``examples`` and ``description`` are shown, not checked).
"""

from __future__ import annotations

import json
import re
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import Any, NoReturn, TypeVar

from flask import request

from app.store.db import WRITE_METHODS
from app.web.access import API_CHALLENGE, PUBLIC, ROLES_ATTR, SIGNED_IN
from app.web.common import ID_MAX
from app.workflow import WorkflowError

API_PREFIX = "/api/v1"
F = TypeVar("F", bound=Callable)
Schema = dict[str, Any] | str
ID = {"type": "integer", "minimum": 1, "maximum": ID_MAX}


@dataclass(frozen=True)
class Media:
    """A response body offered in several media types: each media type with its schema."""

    types: Mapping[str, Schema]


Body = Schema | Media


def id_parameter(name: str) -> dict[str, Any]:
    """A path parameter holding an id; a larger or smaller number answers 404."""
    return {"name": name, "in": "path", "required": True, "schema": dict(ID)}


@dataclass(frozen=True)
class Operation:
    """One documented method on one path (relative to :data:`API_PREFIX`)."""

    method: str
    path: str
    summary: str
    view: Callable
    request_schema: Schema | None
    request_type: str
    responses: Mapping[int, tuple[str, Body | None]]
    tags: tuple[str, ...]
    parameters: tuple[dict[str, Any], ...] | None


OPERATIONS: list[Operation] = []
SCHEMAS: dict[str, dict[str, Any]] = {}


def ref(name: str) -> dict[str, str]:
    """A ``$ref`` to a registered component schema."""
    return {"$ref": f"#/components/schemas/{name}"}


def schema(name: str, definition: dict[str, Any]) -> dict[str, str]:
    """Register a component schema under ``name``; returns its ``$ref``."""
    if name in SCHEMAS and SCHEMAS[name] != definition:
        raise ValueError(f"schema {name!r} is already registered with another definition")
    SCHEMAS[name] = definition
    return ref(name)


def document(method: str, path: str, summary: str, *, request_schema: Schema | None = None,
             request_type: str = "application/json",
             responses: Mapping[int, tuple[str, Body | None]],
             tags: tuple[str, ...] = (), parameters: tuple[dict[str, Any], ...] | None = None
             ) -> Callable[[F], F]:
    """Declare one operation of the view it decorates (see the module docstring)."""
    method = method.upper()
    if not path.startswith("/") or path.startswith(API_PREFIX):
        raise ValueError(f"path {path!r} must start with '/' and be relative to {API_PREFIX}")

    def mark(view: F) -> F:
        for i, op in enumerate(OPERATIONS):
            if (op.method, op.path) == (method, path):
                if (op.view.__qualname__, op.view.__module__) != (view.__qualname__,
                                                                  view.__module__):
                    raise ValueError(f"{method} {path} is already documented by "
                                     f"{op.view.__module__}.{op.view.__qualname__}")
                del OPERATIONS[i]
                break
        OPERATIONS.append(Operation(method, path, summary, view, request_schema, request_type,
                                    dict(responses), tuple(tags), parameters))
        return view

    return mark



# Shared by every API area.
schema("Problem", {
    "type": "object", "required": ["message"],
    "description": "One thing wrong with an uploaded file; row is the 1-based data row.",
    "properties": {"message": {"type": "string"}, "row": {"type": ["integer", "null"]},
                   "column": {"type": ["string", "null"]}},
})
schema("Error", {
    "type": "object", "additionalProperties": False, "required": ["error", "status"],
    "description": "Every refusal and error of the API has this body.",
    "properties": {
        "error": {"type": "string", "description": "A plain sentence naming the field"},
        "status": {"type": "integer"},
        "field": {"type": ["string", "null"],
                  "description": "The field refused, dotted for nested ones "
                                 "(roles.Catalyst.low, exclusions[0].reason)"},
        "problems": {"type": "array", "items": ref("Problem"),
                     "description": "Uploads only: every problem found in the file"},
    },
})
schema("UserRef", {
    "type": "object", "required": ["id", "username", "full_name"],
    "properties": {"id": {"type": "integer"}, "username": {"type": "string"},
                   "full_name": {"type": "string"}},
})

# ---- building the document ----------------------------------------------------------------

def _schema_of(value: Schema | None) -> dict[str, Any] | None:
    if value is None:
        return None
    return ref(value) if isinstance(value, str) else value


def _json_content(value: Body | None) -> dict[str, Any]:
    if isinstance(value, Media):
        return {"content": {kind: {"schema": _schema_of(body)}
                            for kind, body in value.types.items()}}
    body = _schema_of(value)
    return {} if body is None else {"content": {"application/json": {"schema": body}}}


def _access_text(view: Callable) -> tuple[str, frozenset[str]]:
    roles = getattr(view, ROLES_ATTR, None) or frozenset()
    if PUBLIC in roles:
        return "Access: anyone, no sign-in needed.", roles
    if SIGNED_IN in roles:
        return "Access: any signed-in user or API token.", roles
    if not roles:
        return "Access: refused to everyone (the view declares no access rule).", roles
    return "Access: users with the role " + " or ".join(sorted(roles)) + ".", roles


def _operation_object(op: Operation) -> dict[str, Any]:
    access, roles = _access_text(op.view)
    doc = (op.view.__doc__ or "").strip()
    out: dict[str, Any] = {
        # Blueprint modules may reuse view names; the module keeps the id unique.
        "operationId": f"{op.view.__module__.rsplit('.', 1)[-1]}_{op.view.__name__}",
        "summary": op.summary,
        "description": (doc + "\n\n" if doc else "") + access,
        "x-access": sorted(roles),
    }
    if op.tags:
        out["tags"] = list(op.tags)
    names = re.findall(r"{([^}]+)}", op.path)
    params = op.parameters if op.parameters is not None else tuple(
        id_parameter(n) for n in names)
    if params:
        out["parameters"] = list(params)
    responses: dict[str, Any] = {}
    for status, (text, body) in sorted(op.responses.items()):
        entry: dict[str, Any] = {"description": text, **_json_content(body)}
        if status == 201:
            entry["headers"] = {"Location": {"description": "URL of the new object",
                                             "schema": {"type": "string"}}}
        responses[str(status)] = entry
    for status, text in _default_errors(op, roles, bool(names)):
        entry = {"description": text, **_json_content("Error")}
        if status == 401:
            entry["headers"] = {"WWW-Authenticate": {
                "description": f"Always `{API_CHALLENGE}`", "required": True,
                "schema": {"type": "string"}}}
        responses.setdefault(str(status), entry)
    out["responses"] = responses
    if op.request_schema is not None:
        out["requestBody"] = {"required": True, "content": {
            op.request_type: {"schema": _schema_of(op.request_schema)}}}
    return out


def _default_errors(op: Operation, roles: frozenset[str], has_ids: bool
                    ) -> list[tuple[int, str]]:
    """The refusals every operation of this kind can answer, whatever its view does."""
    out = []
    if op.request_schema is not None:
        out.append((400, "A field is missing, unknown, of the wrong type or refused (`field` "
                         "names it), or a browser session sent no `X-CSRF-Token` header"))
    elif op.method in WRITE_METHODS:
        out.append((400, "A browser session sent no `X-CSRF-Token` header"))
    if PUBLIC not in roles:
        out += [(401, "No credentials, or the API token is unknown, revoked, expired or "
                      "belongs to a deactivated user; answered before the request itself is "
                      "checked"),
                (403, "Signed in, but the user's roles do not allow this, the API token has "
                      "the scope `read` and the method is not GET or HEAD, or the one-time "
                      "password must be changed first")]
    if has_ids:
        out.append((404, f"No such object (an id outside 1 to {ID_MAX} matches none)"))
    if op.request_schema is not None:
        out += [(413, "The body is larger than the server accepts"),
                (415, f"The body is not {op.request_type}")]
    return out


def build_document(software_version: str, session_cookie: str = "plumbline") -> dict[str, Any]:
    """The OpenAPI 3.1 document of every registered operation.

    Parameters
    ----------
    software_version : str
        Shown as ``info.version``.
    session_cookie : str
        Name of the browser session cookie, the second way to authenticate.

    Notes
    -----
    Verified in tests/web/test_api.py against the app's URL map (both directions) and, when
    installed, with ``openapi-spec-validator``.
    """
    paths: dict[str, dict[str, Any]] = {}
    for op in sorted(OPERATIONS, key=lambda o: (o.path, o.method)):
        paths.setdefault(op.path, {})[op.method.lower()] = _operation_object(op)
    return {
        "openapi": "3.1.0",
        "info": {
            "title": "Plumbline API",
            "version": software_version,
            "description": (
                "Studies, data versions and fits of designed experiments. Send a personal API "
                "token (created on your account page, which asks for your password again, or "
                "with `plumbline tokens create USERNAME [--scope read|read-write] [--days N]`) "
                "as `Authorization: Bearer plb_...`; it carries the same roles as its user. A "
                "token has a scope: `read` tokens may only call GET and HEAD (anything else "
                "answers 403 naming the scope), `read-write` tokens may call everything their "
                "user may. Every token expires (90 days unless chosen otherwise) and then "
                "answers 401 like an unknown one; changing the password revokes all of the "
                "user's tokens. Browser sessions work too, but then every POST needs the "
                "`X-CSRF-Token` header. Errors are JSON `{error, status, field}`; rows are the "
                "1-based data rows of the uploaded table."),
        },
        "servers": [{"url": API_PREFIX}],
        "security": [{"bearerAuth": []}, {"sessionCookie": []}],
        "paths": paths,
        "components": {
            "securitySchemes": {
                "bearerAuth": {"type": "http", "scheme": "bearer",
                               "description": "Personal API token, prefix plb_, with a scope "
                                              "(read: GET and HEAD only; read-write) and an "
                                              "expiry"},
                "sessionCookie": {"type": "apiKey", "in": "cookie", "name": session_cookie},
            },
            "schemas": dict(sorted(SCHEMAS.items())),
        },
    }


# ---- reading and checking request bodies --------------------------------------------------

_TYPES: dict[str, Callable[[Any], bool]] = {
    "object": lambda v: isinstance(v, dict),
    "array": lambda v: isinstance(v, list),
    "string": lambda v: isinstance(v, str),
    "boolean": lambda v: isinstance(v, bool),
    "null": lambda v: v is None,
    "number": lambda v: isinstance(v, int | float) and not isinstance(v, bool),
    "integer": lambda v: (isinstance(v, int) and not isinstance(v, bool))
    or (isinstance(v, float) and v.is_integer()),
}
_TYPE_WORDS = {"object": "an object", "array": "a list", "string": "text",
               "boolean": "true or false", "null": "null", "number": "a number",
               "integer": "a whole number"}


def _describe(value: Any) -> str:
    for name in ("boolean", "null", "integer", "number", "string", "array", "object"):
        if _TYPES[name](value):
            return _TYPE_WORDS[name]
    return type(value).__name__


def _refuse(field: str, message: str) -> NoReturn:
    raise WorkflowError(f"Field '{field}' {message}", field=field)


def check(value: Any, definition: Schema, field: str = "body") -> Any:
    """Check ``value`` against a schema; raise WorkflowError naming the first bad field.

    ``field`` is the dotted path shown in messages (``exclusions[0].row``). Returns ``value``.
    Covers the JSON Schema subset listed in the module docstring.
    """
    sch = _schema_of(definition) or {}
    if "$ref" in sch:
        return check(value, SCHEMAS[sch["$ref"].rsplit("/", 1)[-1]], field)
    types = sch.get("type")
    if types is not None:
        allowed = [types] if isinstance(types, str) else list(types)
        if not any(_TYPES[t](value) for t in allowed):
            wanted = " or ".join(_TYPE_WORDS[t] for t in allowed)
            _refuse(field, f"must be {wanted}, not {_describe(value)}.")
    if "enum" in sch and value not in sch["enum"]:
        choices = ", ".join("null" if c is None else str(c) for c in sch["enum"])
        _refuse(field, f"must be one of {choices} (got {value!r}).")
    if isinstance(value, str) and len(value) < sch.get("minLength", 0):
        _refuse(field, "must not be empty." if sch["minLength"] == 1
                else f"needs at least {sch['minLength']} characters.")
    if _TYPES["number"](value):
        least, most = sch.get("minimum"), sch.get("maximum")
        if least is not None and most is not None and not least <= value <= most:
            _refuse(field, f"must lie between {least} and {most} (got {value}).")
        if least is not None and value < least:
            _refuse(field, f"must be at least {least} (got {value}).")
        if most is not None and value > most:
            _refuse(field, f"must be at most {most} (got {value}).")
        low, high = sch.get("exclusiveMinimum"), sch.get("exclusiveMaximum")
        if (low is not None and value <= low) or (high is not None and value >= high):
            _refuse(field, f"must lie strictly between {low} and {high} (got {value}).")
    if isinstance(value, list):
        if len(value) < sch.get("minItems", 0):
            _refuse(field, f"needs at least {sch['minItems']} item(s).")
        if "items" in sch:
            for i, item in enumerate(value):
                check(item, sch["items"], f"{field}[{i}]")
    if isinstance(value, dict):
        _check_object(value, sch, field)
    return value


def _check_object(value: dict, sch: dict[str, Any], field: str) -> None:
    props = sch.get("properties", {})
    prefix = "" if field == "body" else field + "."
    for name in sch.get("required", ()):
        if name not in value:
            _refuse(prefix + name, "is required.")
    extra = sch.get("additionalProperties", True)
    pattern = sch.get("propertyNames", {}).get("pattern")
    for key, item in value.items():
        if pattern and not re.search(pattern, key):
            _refuse(prefix + key, f"is not an allowed key here (keys must match {pattern}).")
        if key in props:
            check(item, props[key], prefix + key)
        elif extra is False:
            known = ", ".join(sorted(props)) or "none"
            _refuse(prefix + key, f"is not known (known fields: {known}).")
        elif isinstance(extra, dict):
            check(item, extra, prefix + key)


def _no_constant(name: str):
    raise ValueError(f"{name} is not a JSON number")


def json_body(definition: Schema) -> dict[str, Any]:
    """The request's JSON body, checked against ``definition``.

    Raises WorkflowError 415 when the body is not ``application/json``, 400 naming the field
    when it does not parse or does not match.
    """
    if request.mimetype != "application/json":
        raise WorkflowError(f"Send the body as application/json (got "
                            f"'{request.mimetype or 'no Content-Type'}').",
                            field="Content-Type", status=415)
    text = request.get_data(cache=True, as_text=False)
    try:
        value = json.loads(text, parse_constant=_no_constant)
    except (ValueError, UnicodeDecodeError) as exc:
        raise WorkflowError(f"The body is not valid JSON: {exc}.", field="body") from None
    return check(value, definition)
