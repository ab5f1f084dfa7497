"""Two approvers sign the same submitted fit at the same moment: exactly one wins, every time.

Runs on SQLite and, when PLUMBLINE_TEST_DATABASE_URL is set, on PostgreSQL (the ``db``
fixture). On SQLite write transactions queue (BEGIN IMMEDIATE), so the loser usually finds the
fit already approved; on PostgreSQL both read "submitted" and the conditional UPDATE decides.
"""

from __future__ import annotations

import threading
from collections import Counter

from sqlalchemy import func, select

from app.store import audit
from app.store.models import AuditEvent, Fit, Signature
from app.workflow import Conflict
from tests.workflow import helpers as h

TRIALS = 200


def _submitted_copies(db, fit_id: int, n: int) -> list[int]:
    """``n`` submitted copies of one fit snapshot (same hash), made directly for speed."""
    with db.transaction() as s:
        source = s.get(Fit, fit_id)
        copies = [Fit(study_id=source.study_id, data_version_id=source.data_version_id,
                      response=source.response, spec_json=source.spec_json,
                      results_json=source.results_json, thresholds_json=source.thresholds_json,
                      software_version=source.software_version,
                      snapshot_sha256=source.snapshot_sha256, state="submitted", row_version=2,
                      created_by_id=source.created_by_id, submitted_by_id=source.created_by_id,
                      submitted_at=source.created_at) for _ in range(n)]
        s.add_all(copies)
        s.flush()
        return [c.id for c in copies]


def _approve(db, fit_id: int, who: str, barrier: threading.Barrier, outcome: list) -> None:
    barrier.wait()
    try:
        h.sign(db, fit_id, who=who, expected_row_version=2)
        outcome.append(("won", who))
    except Conflict as exc:
        lost_at = "update" if exc.field == "row_version" else "state"
        outcome.append((f"lost at {lost_at}", who))
    except Exception as exc:  # any other failure is a defect: report it, never hide it
        outcome.append((f"error {type(exc).__name__}: {exc}", who))


def test_two_concurrent_approvals_exactly_one_wins(db, users, backend):
    study_id = h.make_study(db)
    source = h.make_fit(db, h.add_version(db, study_id), model="linear")
    copies = _submitted_copies(db, source, TRIALS)
    tally: Counter[str] = Counter()
    for fit_id in copies:
        barrier, outcome = threading.Barrier(2), []
        threads = [threading.Thread(target=_approve, args=(db, fit_id, who, barrier, outcome))
                   for who in ("abel", "ada")]
        for t in threads:
            t.start()
        for t in threads:
            t.join()
        kinds = sorted(kind for kind, _who in outcome)
        assert len(kinds) == 2 and kinds.count("won") == 1, (fit_id, outcome)
        assert kinds[0].startswith("lost at"), (fit_id, outcome)
        tally.update(kinds)
    print(f"\n{backend}: {TRIALS} trials, outcomes {dict(tally)}")
    assert tally["won"] == TRIALS
    with db.session() as s:
        assert s.scalar(select(func.count()).select_from(Signature)) == TRIALS
        assert s.scalar(select(func.count()).select_from(AuditEvent)
                        .where(AuditEvent.action == "fit.approve")) == TRIALS
        # Each approval superseded the one before it: one approved fit is left.
        states = Counter(s.scalars(select(Fit.state).where(Fit.id.in_(copies))))
        assert states == {"approved": 1, "superseded": TRIALS - 1}
        assert audit.verify(s).ok
