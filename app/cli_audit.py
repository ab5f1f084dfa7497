"""``plumbline audit``: verify the audit chain in the database (and against an anchor file), or
a record package offline; print the chain head for an external log."""

from __future__ import annotations

import sys
from pathlib import Path

import click


@click.group("audit", help="The audit trail: verify the hash chain or a record package.")
def audit_group() -> None:
    pass


@audit_group.command("verify")
@click.option("--package", "package_file", type=click.Path(exists=True, dir_okay=False,
                                                            path_type=Path),
              help="Check a study's record package (ZIP) offline instead of the database.")
@click.option("--anchor", "anchor_file", type=click.Path(exists=True, dir_okay=False,
                                                          path_type=Path),
              help="Also require every head anchored in FILE (e.g. instance/audit-anchor.log) "
                   "to be in the chain.")
def verify(package_file: Path | None, anchor_file: Path | None) -> None:
    """Exit 0 and print the chain head when everything holds; exit 1 naming what does not."""
    if package_file is not None and anchor_file is not None:
        raise click.UsageError("--anchor checks the database; it cannot be used with --package")
    if package_file is not None:
        from app.workflow.package import verify_package

        report = verify_package(package_file.read_bytes())
        if not report.ok:
            for problem in report.problems:
                click.echo(f"broken: {problem}", err=True)
            click.echo(report.describe())
            sys.exit(1)
        click.echo(report.describe())
        return
    from sqlalchemy import select

    from app.cli import _app
    from app.store import audit
    from app.store.anchor import check_anchors
    from app.store.db import database
    from app.store.models import AuditEvent

    db = database(_app())
    anchors = None
    try:
        with db.session(write=False) as s:
            report = audit.verify(s)
            if anchor_file is not None:
                chain = dict(s.execute(select(AuditEvent.seq, AuditEvent.hash)).all())
                with anchor_file.open(encoding="utf-8", errors="replace") as lines:
                    anchors = check_anchors(lines, db.anchor.key(), chain)
    finally:
        db.dispose()  # close pooled connections before the process (or test) moves on
    click.echo(report.describe())
    if anchors is not None:
        for note in anchors.notes():
            click.echo(f"not checkable: {note}", err=True)
        for problem in anchors.problems():
            click.echo(f"broken: {problem}", err=True)
        click.echo(anchors.describe())
    if not report.ok or (anchors is not None and not anchors.ok):
        sys.exit(1)


@audit_group.command("anchor")
def anchor() -> None:
    """Print the chain head (sequence number, hash, UTC time, key id, HMAC-SHA-256 under the
    integrity key) as one line for a log kept outside this server; `verify --anchor` reads it."""
    from app.cli import _app
    from app.store import audit
    from app.store.db import database

    db = database(_app())
    try:
        with db.session(write=False) as s:
            seq, head_hash = audit.chain_head(s)
    finally:
        db.dispose()
    click.echo(db.anchor.line(seq, head_hash))
