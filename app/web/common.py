"""Small helpers shared by the blueprints."""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import contextmanager

from flask import Response, g
from sqlalchemy.orm import Session

from app.store.db import get_session


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
    """A download: always ``Content-Disposition: attachment`` with a safe file name."""
    safe = "".join(c if c.isalnum() or c in "._-" else "_" for c in filename) or "download"
    response = Response(body, mimetype=mimetype)
    response.headers["Content-Disposition"] = f'attachment; filename="{safe}"'
    return response


def current_user():
    return g.user


def float_field(form, name: str, label: str, default: float | None = None) -> float:
    from app.workflow import WorkflowError

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
