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
    """Check the chain (hashes, links, seals under the integrity key) and replay it against the
    tables. Exit 0 and print the chain head when everything holds; exit 1 naming what does
    not."""
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
    from app.store.anchor import check_anchors
    from app.store.db import database
    from app.store.models import AuditEvent
    from app.workflow.replay import verified_replay

    db = database(_app())
    anchors = None
    try:
        with db.session(write=False) as s:
            report, found = verified_replay(s)
            if anchor_file is not None:
                chain = dict(s.execute(select(AuditEvent.seq, AuditEvent.hash)).all())
                with anchor_file.open(encoding="utf-8", errors="replace") as lines:
                    anchors = check_anchors(lines, db.keys.ring(), chain)
    finally:
        db.dispose()  # close pooled connections before the process (or test) moves on
    click.echo(report.describe())
    for item in found:
        click.echo(f"broken: {item.describe()}", err=True)
    click.echo(f"records against the trail: {len(found)} disagreement(s)" if found else
               "records against the trail: fits, setpoints, signatures, data versions and "
               "confirmation runs agree with the trail")
    if anchors is not None:
        for note in anchors.notes():
            click.echo(f"not checkable: {note}", err=True)
        for problem in anchors.problems():
            click.echo(f"broken: {problem}", err=True)
        click.echo(anchors.describe())
    if not report.ok or found or (anchors is not None and not anchors.ok):
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


@audit_group.command("rotate-key")
@click.option("--reason", required=True, help="Why the key is rotated (kept in the trail).")
@click.option("--record", "record_only", is_flag=True,
              help="The key is set by PLUMBLINE_INTEGRITY_KEY and was already changed there "
                   "(the old one moved to PLUMBLINE_INTEGRITY_RETIRED_KEYS): only put the "
                   "rotation on the record.")
def rotate_key(reason: str, record_only: bool) -> None:
    """Take the integrity key out of service and seal from now on with a new one.

    The old key is kept (instance/integrity_keys.retired) so that older seals still check.
    The rotation is one audit event sealed with the new key, naming the old and new key ids;
    the new key is put in place once that event is committed. Stop the server first."""
    from sqlalchemy import select

    from app.cli import _app, _fail
    from app.store import audit
    from app.store.db import database
    from app.store.keys import Keyring
    from app.store.models import AuditEvent

    app = _app()
    db = database(app)
    try:
        if record_only:
            if not db.keys.configured:
                _fail("--record is for a key set by PLUMBLINE_INTEGRITY_KEY; without it, run "
                      "rotate-key alone")
            ring = db.keys.ring()
            with db.session(write=False) as s:
                old_id = s.scalar(select(AuditEvent.key_id).where(AuditEvent.key_id.is_not(None))
                                  .order_by(AuditEvent.seq.desc()).limit(1))
            if old_id is None or old_id == ring.current_id:
                _fail("the key in PLUMBLINE_INTEGRITY_KEY is the one already in use: set the "
                      "new key there first")
            if ring.key(old_id) is None:
                _fail(f"the key in use until now ({old_id}) is not among "
                      "PLUMBLINE_INTEGRITY_RETIRED_KEYS: add it, or its seals cannot be checked")
            new_id, pending = ring.current_id, None
        else:
            try:
                old_id, new_id, pending = db.keys.rotate()
            except RuntimeError as exc:
                _fail(str(exc))
            old = db.keys.ring()
            ring = Keyring(pending.read_text().strip().encode(),
                           {**old.retired, old.current_id: old.current})
        with db.transaction() as s:
            s.info["plumbline_keyring"] = ring
            audit.record(s, actor=None, action="integrity.key_rotate", object_type="integrity",
                         old={"key_id": old_id}, new={"key_id": new_id}, reason=reason)
        if pending is not None:
            db.keys.install(pending)
    finally:
        db.dispose()
    click.echo(f"integrity key rotated: {old_id} -> {new_id}; earlier seals still check with "
               "the retired key")
