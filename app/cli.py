"""The ``plumbline`` command."""

from __future__ import annotations

import sys
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import TYPE_CHECKING, Any

import click

from app import create_app

if TYPE_CHECKING:
    from flask import Flask


def _app():
    """The application for a command that needs its configuration and database, not its pages
    (which would import the analysis and chart libraries)."""
    return create_app(web=False)


@contextmanager
def _application(*, web: bool = False) -> Iterator[Flask]:
    """The application for one command; its database engines are disposed when it ends.

    An engine left to the garbage collector closes its pooled connections late, which on
    PostgreSQL shows as a ResourceWarning when a command runs in-process (tests, scripts).
    ``web`` registers the pages too (``plumbline serve``).
    """
    from app.store.db import database

    app = create_app() if web else _app()
    try:
        yield app
    finally:
        database(app).dispose()


@click.group(help="Plumbline: designed-experiment models, residual checks and sign-off.")
def main() -> None:
    pass


# ---- database -----------------------------------------------------------------------------

@main.group(help="Database schema.")
def db() -> None:
    pass


@db.command("upgrade", help="Apply all migrations (creates the database when new).")
@click.option("--revision", default="head", show_default=True)
def db_upgrade(revision: str) -> None:
    from app.store import audit
    from app.store.db import database
    from app.store.migrate import upgrade

    with _application() as app:
        upgrade(app.config["DATABASE_URL"], revision)
        click.echo(f"database at {revision}: {_redacted(app.config['DATABASE_URL'])}")
        if revision == "head":
            with database(app).transaction() as s:
                earlier = audit.begin_sealing(s)
            if earlier:
                click.echo(f"audit trail: {earlier} events written before sealing began are "
                           "now covered by a sealed event")


def _redacted(url: str) -> str:
    from sqlalchemy.engine import make_url

    return make_url(url).render_as_string(hide_password=True)


# ---- users --------------------------------------------------------------------------------

@main.group(help="User accounts.")
def users() -> None:
    pass


def _fail(message: str) -> None:
    click.echo(f"error: {message}", err=True)
    sys.exit(2)


@contextmanager
def _account_change() -> Iterator[Any]:
    """One transaction for an account command; a refusal ends the command with its message."""
    from app.store.db import database
    from app.workflow import WorkflowError

    try:
        with _application() as app, database(app).transaction() as s:
            yield s
    except WorkflowError as exc:
        _fail(exc.message)


@users.command("add")
@click.argument("username")
@click.option("--name", "full_name", required=True, help="Full name, printed with signatures.")
@click.option("--roles", required=True, help="Comma-separated: engineer,approver,auditor,admin.")
@click.option("--password-stdin", is_flag=True, help="Read the password from standard input.")
@click.option("--one-time", is_flag=True, help="The user must change it at first sign-in.")
def users_add(username: str, full_name: str, roles: str, password_stdin: bool,
              one_time: bool) -> None:
    from app.store.db import database
    from app.workflow import WorkflowError, accounts

    if password_stdin:
        password = sys.stdin.readline().rstrip("\r\n")
    else:
        password = click.prompt("Password", hide_input=True, confirmation_prompt=True)
    try:
        with _application() as app, database(app).transaction() as s:
            user = accounts.create_user(s, None, username=username, full_name=full_name,
                                        roles=roles, password=password, one_time=one_time)
            click.echo(f"added {user.username} ({user.full_name}): {user.roles}")
    except WorkflowError as exc:
        _fail(exc.message)


@users.command("list")
def users_list() -> None:
    from sqlalchemy import select

    from app.store.db import database
    from app.store.models import User

    with _application() as app, database(app).session(write=False) as s:
        for u in s.scalars(select(User).order_by(User.username)):
            state = "active" if u.active else "deactivated"
            click.echo(f"{u.username}\t{u.full_name}\t{u.roles}\t{state}")


@users.command("set-roles")
@click.argument("username")
@click.argument("roles")
def users_set_roles(username: str, roles: str) -> None:
    from app.workflow import accounts

    with _account_change() as s:
        user = accounts.set_roles(s, None, username, roles)
        click.echo(f"{user.username}: {user.roles}")


@users.command("deactivate")
@click.argument("username")
def users_deactivate(username: str) -> None:
    from app.workflow import accounts

    with _account_change() as s:
        accounts.set_active(s, None, username, False)
        click.echo(f"{username}: deactivated; sessions and tokens revoked")


@users.command("rename")
@click.argument("username")
@click.option("--name", "full_name", required=True, help="The new printed name.")
def users_rename(username: str, full_name: str) -> None:
    """Change the printed name; it must stay unique among active users."""
    from app.workflow import accounts

    with _account_change() as s:
        user = accounts.set_full_name(s, None, username, full_name)
        click.echo(f"{user.username}: {user.full_name}")


@users.command("unlock")
@click.argument("username")
def users_unlock(username: str) -> None:
    """End a signing and password-change lock after too many wrong passwords."""
    from app.workflow import accounts

    with _account_change() as s:
        accounts.unlock(s, None, username)
        click.echo(f"{username}: signing and password change unlocked")


# ---- tokens -------------------------------------------------------------------------------

@main.group(help="Personal API tokens.")
def tokens() -> None:
    pass


@tokens.command("create", help="Print a new personal API token for USERNAME once. Run on the "
                "server by its administrator, so no password is asked.")
@click.argument("username")
@click.option("--name", default="command line", show_default=True)
@click.option("--scope", type=click.Choice(["read", "read-write"]), default="read-write",
              show_default=True, help="read: GET only; read-write: every call the user may make.")
@click.option("--days", type=int, default=None,
              help="Days until the token expires [default: API_TOKEN_DAYS, 90].")
def tokens_create(username: str, name: str, scope: str, days: int | None) -> None:
    from app.store.db import database
    from app.workflow import WorkflowError, accounts

    try:
        with _application() as app, database(app).transaction() as s:
            user = accounts.get_user(s, username)
            _token, raw = accounts.create_token(
                s, None, user, name, scope=scope,
                days=int(app.config["API_TOKEN_DAYS"]) if days is None else days,
                max_days=int(app.config["API_TOKEN_MAX_DAYS"]))
    except WorkflowError as exc:
        _fail(exc.message)
    click.echo(raw)


# ---- demo and server ----------------------------------------------------------------------

@main.group(help="The demonstration scenario.")
def demo() -> None:
    pass


@demo.command("load")
@click.option("--if-empty", is_flag=True, help="Do nothing when the database already has users.")
def demo_load(if_empty: bool) -> None:
    from app.demo import load_demo

    with _application() as app:
        lines = load_demo(app, only_if_empty=if_empty)
    for line in lines:
        click.echo(line)


@main.command("serve", help="Serve the application with waitress (never in debug mode).")
@click.option("--host", default="127.0.0.1", show_default=True)
@click.option("--port", default=5000, show_default=True, type=int)
@click.option("--threads", default=8, show_default=True, type=int)
def serve(host: str, port: int, threads: int) -> None:
    import waitress

    with _application(web=True) as app:
        app.debug = False
        click.echo(f"Plumbline on http://{host}:{port}/")
        waitress.serve(app, host=host, port=port, threads=threads, ident="plumbline")


# ---- backup -------------------------------------------------------------------------------

@main.command("backup", help="Online backup of the SQLite database to FILE, then check it.")
@click.argument("file", type=click.Path(dir_okay=False, path_type=Path))
def backup_command(file: Path) -> None:
    from app.store.backup import BackupError, backup
    from app.store.db import database

    with _application() as app:
        url = app.config["DATABASE_URL"]
        ring = database(app).keys.ring()
    try:
        report = backup(url, file, ring)
    except BackupError as exc:
        _fail(str(exc))
    click.echo(f"backup {report.path}: integrity {report.integrity}; {report.chain.describe()}")


@main.command("restore", help="Replace the SQLite database with FILE (stop the server first).")
@click.argument("file", type=click.Path(dir_okay=False, path_type=Path))
@click.option("--yes", is_flag=True, help="Do not ask for confirmation.")
def restore_command(file: Path, yes: bool) -> None:
    from app.store.backup import BackupError, restore
    from app.store.db import database

    with _application() as app:
        url = app.config["DATABASE_URL"]
        ring = database(app).keys.ring()
    if not yes:
        click.confirm(f"Replace {_redacted(url)} with {file}?", abort=True)
    try:
        report = restore(url, file, ring)
    except BackupError as exc:
        _fail(str(exc))
    click.echo(f"restored: integrity {report.integrity}; {report.chain.describe()}")
    if not report.ok:
        sys.exit(1)


# ---- analysis without a database, and the audit trail --------------------------------------
# (cli_check imports only the light spec module; the analysis loads when `check` runs)

from app.cli_audit import audit_group  # noqa: E402  (registered after the groups above)
from app.cli_check import check_command  # noqa: E402
from app.cli_plan import plan_command  # noqa: E402

main.add_command(check_command, "check")
main.add_command(audit_group, "audit")
main.add_command(plan_command, "plan")
