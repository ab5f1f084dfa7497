"""``plumbline demo load``: the invented demonstration scenario (see app/demo_data.py)."""

from __future__ import annotations

import secrets

from flask import Flask
from sqlalchemy import func, select

from app.demo_data import DEMO_PEOPLE, PLANT, demo_studies
from app.ingest import read_upload, validate
from app.store.db import database
from app.store.models import User
from app.workflow import accounts, studies, uploads


def _one_time_password() -> str:
    return "-".join(secrets.token_urlsafe(4) for _ in range(4))


def load_demo(app: Flask, *, only_if_empty: bool = False) -> list[str]:
    """Create the demo people and studies in one transaction; return lines to print."""
    db = database(app)
    with db.transaction() as s:
        if s.scalar(select(func.count()).select_from(User)):
            if only_if_empty:
                return ["database already has users; demo not loaded"]
        lines = [f"Demo scenario: {PLANT} (invented)."]
        people, accounts_shown = {}, []
        for username, full_name, roles in DEMO_PEOPLE:
            password = _one_time_password()
            people[roles[0]] = accounts.create_user(
                s, None, username=username, full_name=full_name, roles=list(roles),
                password=password, one_time=True)
            accounts_shown.append(f"{username:<10} {', '.join(roles):<10} {password}")
        engineer = people["engineer"]
        for demo in demo_studies():
            study = studies.create_study(s, engineer, title=demo.title, purpose=demo.purpose,
                                         process=demo.process)
            raw = read_upload(demo.csv_bytes, demo.filename)
            table = validate(raw, demo.roles)
            uploads.add_data_version(s, engineer, study, data=demo.csv_bytes,
                                     filename=demo.filename, raw=raw, table=table)
            lines.append(f"study {study.id}: {study.title} ({len(table.frame)} runs)")
    # The accounts last and framed, so that they stand out from whatever was printed before.
    return lines + framed(["Demo accounts: one-time passwords, shown only now", "",
                           *accounts_shown, "",
                           "Each person must choose a new password at first sign-in."])


def framed(rows: list[str]) -> list[str]:
    """``rows`` inside a box of ASCII rules."""
    width = max(map(len, rows))
    rule = "+" + "-" * (width + 2) + "+"
    return ["", rule, *(f"| {row:<{width}} |" for row in rows), rule, ""]
