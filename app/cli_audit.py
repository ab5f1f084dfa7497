"""``plumbline audit``: verify the audit chain in the database, or a record package offline."""

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
def verify(package_file: Path | None) -> None:
    """Exit 0 and print the chain head when everything holds; exit 1 naming what does not."""
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
    from app.cli import _app
    from app.store import audit
    from app.store.db import database

    db = database(_app())
    try:
        with db.session(write=False) as s:
            report = audit.verify(s)
    finally:
        db.dispose()  # close pooled connections before the process (or test) moves on
    click.echo(report.describe())
    if not report.ok:
        sys.exit(1)
