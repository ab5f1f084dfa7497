"""Small helpers shared by the blueprints."""

from __future__ import annotations

import os
import re
import unicodedata
from collections.abc import Iterator
from contextlib import contextmanager
from urllib.parse import quote

from flask import Response, g
from sqlalchemy.orm import Session
from werkzeug.routing import IntegerConverter
from werkzeug.utils import secure_filename

from app.store.db import get_session
from app.workflow import ID_MAX, NotFound, WorkflowError, in_id_range


class IdConverter(IntegerConverter):
    """``<int:...>`` in every route: unsigned and at most :data:`ID_MAX` (the largest id the
    database's integer columns hold), so a larger number in a URL matches no route (404)
    instead of failing in the database."""

    def __init__(self, map, fixed_digits: int = 0, min: int | None = None,
                 max: int | None = ID_MAX, signed: bool = False) -> None:
        super().__init__(map, fixed_digits, min, max, signed)


@contextmanager
def tx() -> Iterator[Session]:
    """The request's session inside one transaction (commit on success, roll back on error)."""
    session = get_session()
    if session.in_transaction():
        session.commit()
    with session.begin():
        yield session


@contextmanager
def read_session() -> Iterator[Session]:
    """A short read-only session (no write lock), e.g. for work done before a write."""
    from app.store.db import database

    with database().session(write=False) as session:
        yield session


def attachment(body: bytes | str, filename: str, mimetype: str) -> Response:
    """A download: always ``Content-Disposition: attachment``, under any file name.

    ``filename=`` is an ASCII fallback (werkzeug's ``secure_filename``; ``download`` when
    nothing of the name is left, keeping its extension). When that is not the name itself,
    ``filename*=UTF-8''...`` (RFC 5987, as RFC 6266 asks) carries the name as uploaded, e.g.
    ``Messdaten-Ω-試験.csv``, without its folders or control characters.
    """
    base = re.split(r"[\\/]", filename)[-1]
    name = "".join(c for c in base if unicodedata.category(c)[0] != "C").strip(" .")
    stem, extension = (secure_filename(part) for part in os.path.splitext(name))
    fallback = (stem or "download") + ("." + extension if extension else "")
    names = {"filename": fallback}
    if name and name != fallback:
        names["filename*"] = "UTF-8''" + quote(name, safe="!#$&+-.^_`|~")
    response = Response(body, mimetype=mimetype)
    response.headers.set("Content-Disposition", "attachment", **names)
    return response


def parse_id(raw: str, what: str, field: str) -> int:
    """An id typed into a query or form field, e.g. ``parse_id("12", "fit", "a")``.

    Not a whole number: 400 naming ``field``. A whole number outside 1 to :data:`ID_MAX`: 404,
    as for a missing row, because no stored row has that id (and the database would fail on a
    number its integer column cannot hold).
    """
    text = (raw or "").strip()
    shown = text if len(text) <= 24 else text[:20] + "…"  # the message need not echo it all
    if not (text.isascii() and text.isdigit()):
        raise WorkflowError(f"{what.capitalize()} '{shown}' is not a {what} number.", field=field)
    # Count digits before converting: int() refuses very long digit strings.
    digits = text.lstrip("0")
    if len(digits) > len(str(ID_MAX)) or not in_id_range(int(digits or "0")):
        raise NotFound(f"No {what} {shown}.", field=field)
    return int(digits)


def id_field(values, name: str, what: str) -> int | None:
    """The id in field ``name`` of ``request.args`` or ``request.form``; None when the field is
    absent or blank, otherwise as :func:`parse_id`."""
    raw = (values.get(name) or "").strip()
    return parse_id(raw, what, name) if raw else None


def current_user():
    return g.user


def float_field(form, name: str, label: str, default: float | None = None) -> float:
    raw = (form.get(name) or "").strip()
    if not raw and default is not None:
        return default
    try:
        return float(raw.replace(",", "."))
    except ValueError:
        raise WorkflowError(f"{label} must be a number (got '{raw}').", field=name) from None


def me(session: Session):
    """The signed-in user, loaded in ``session``."""
    from app.store.models import User

    return session.get(User, g.user.id)


def team_step(study_id: int, doing: str, act):
    """Run ``act(session)`` in one transaction; a refusal for want of authority on the study
    (not its owner, not on its team, not an admin) is audited in a transaction of its own and
    raised again (app.workflow.teams.record_refusal)."""
    from app.workflow import Forbidden, teams

    try:
        with tx() as s:
            return act(s)
    except (Forbidden, NotFound) as exc:
        if isinstance(exc, Forbidden) or exc.field == "study":
            get_session().rollback()
            with tx() as s:
                teams.record_refusal(s, me(s), study_id, doing, exc)
        raise
