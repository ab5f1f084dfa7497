"""Dropping the triggers that guard signatures, fit and setpoint snapshots, confirmation
runs and fits' per-run tables (migrations 0005, 0007 and 0008), the way someone with write
access to the database could, so tests can tamper on purpose."""

from __future__ import annotations

from sqlalchemy import text
from sqlalchemy.orm import Session

TRIGGERS = {
    "signatures": ("signatures_no_update", "signatures_no_delete", "signatures_no_truncate"),
    "fits": ("fits_snapshot_no_update", "fits_no_delete", "fits_no_truncate"),
    "setpoint_proposals": ("setpoint_proposals_snapshot_no_update",
                           "setpoint_proposals_no_delete", "setpoint_proposals_no_truncate"),
    "confirmation_runs": ("confirmation_runs_no_update", "confirmation_runs_no_delete",
                          "confirmation_runs_no_truncate"),
    "fit_runs": ("fit_runs_no_update", "fit_runs_no_delete", "fit_runs_no_truncate"),
}


def drop_signed_row_triggers(s: Session) -> None:
    """Drop them inside the caller's transaction (before its tampering statement)."""
    sqlite = s.get_bind().dialect.name == "sqlite"
    for table, names in TRIGGERS.items():
        for name in names:
            s.execute(text(f"DROP TRIGGER IF EXISTS {name}" if sqlite
                           else f"DROP TRIGGER IF EXISTS {name} ON {table}"))
