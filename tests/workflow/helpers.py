"""Building studies, data versions and fits through the services, for sign-off tests."""

from __future__ import annotations

from sqlalchemy import select

from app.analysis import Thresholds
from app.demo_data import rsm_study
from app.ingest import ColumnRole, read_upload, validate
from app.store.models import User
from app.workflow import fits, reviews, signing, studies, teams, uploads
from tests.conftest import PASSWORD


def user(s, username: str) -> User:
    return s.scalar(select(User).where(User.username == username))


def make_study(db, title: str = "Cure study") -> int:
    with db.transaction() as s:
        return studies.create_study(s, user(s, "erin"), title=title).id


def add_version(db, study_id: int, reason: str | None = None, who: str = "erin") -> int:
    """Upload the demo cure-oven data (again) as the study's next data version."""
    demo = rsm_study()
    with db.transaction() as s:
        study = studies.get_study(s, study_id)
        raw = read_upload(demo.csv_bytes, demo.filename)
        return uploads.add_data_version(s, user(s, who), study, data=demo.csv_bytes,
                                        filename=demo.filename, raw=raw,
                                        table=validate(raw, demo.roles), reason=reason).id


def make_fit(db, version_id: int, *, model: str = "quadratic", response: str = "Hardness",
             exclusions: dict[int, str] | None = None, author: str = "erin") -> int:
    with db.transaction() as s:
        version = uploads.get_data_version(s, version_id)
        spec = fits.build_spec(version, response=response, model=model, exclusions=exclusions,
                               thresholds=Thresholds())
        return fits.create_fit(s, user(s, author), version, spec).id


def own_submitted_fit(db, username: str = "bo", full_name: str = "Bo Both") -> int:
    """A fit made, uploaded and submitted by one person who is engineer and approver both
    (allowed: only admin with approver is barred), so that the duties rule stops them."""
    from app.workflow import accounts

    with db.transaction() as s:
        accounts.create_user(s, None, username=username, full_name=full_name,
                             roles="engineer,approver", password=PASSWORD)
    study_id = make_study(db)
    join(db, study_id, username)
    fit_id = make_fit(db, add_version(db, study_id), author=username, model="linear")
    submit(db, fit_id)
    return fit_id


def submit(db, fit_id: int, who: str = "erin") -> None:
    with db.transaction() as s:
        reviews.submit(s, user(s, who), fits.get_fit(s, fit_id))


def signed(db, who: str, password: str | None, attempt: signing.Attempt, act,
           limits: signing.Lockout = signing.Lockout()):
    """A signing step as the pages run it: the password checked in a read session, then
    ``act(session, actor, proof)`` in one write transaction; a refusal is audited."""
    with db.session(write=False) as s:
        actor_id = user(s, who).id
    return signing.signed(lambda: db.session(write=False), db.transaction, actor_id=actor_id,
                          password=password, attempt=attempt, act=act, limits=limits)


def sign(db, fit_id: int, who: str = "abel", meaning: str = reviews.APPROVE,
         password: str = PASSWORD, comment: str | None = None, expected_row_version=None):
    def act(s, actor, proof):
        return reviews.sign(s, actor, fits.get_fit(s, fit_id), meaning=meaning, proof=proof,
                            comment=comment, expected_row_version=expected_row_version).id

    return signed(db, who, password, reviews.attempt(fit_id, "sign"), act)


def withdraw(db, fit_id: int, who: str = "ada", password: str = PASSWORD,
             reason: str = "Catalyst lot recalled"):
    def act(s, actor, proof):
        return reviews.withdraw(s, actor, fits.get_fit(s, fit_id), proof=proof,
                                reason=reason).id

    return signed(db, who, password, reviews.attempt(fit_id, "withdraw"), act)


def approved_fit(db, *, model: str = "quadratic") -> tuple[int, int, int]:
    """A study with one data version and an approved fit: (study, version, fit) ids."""
    study_id = make_study(db)
    version_id = add_version(db, study_id)
    fit_id = make_fit(db, version_id, model=model)
    submit(db, fit_id)
    sign(db, fit_id)
    return study_id, version_id, fit_id


def join(db, study_id: int, username: str, by: str | None = None) -> None:
    """Put ``username`` on the study's team (added by its owner unless ``by`` is given)."""
    with db.transaction() as s:
        study = studies.get_study(s, study_id)
        actor = user(s, by) if by else study.owner
        teams.add_member(s, actor, study, username)


def study_with_approved_fits(db, title: str) -> tuple[int, int, int]:
    """A study with the demo data and an approved quadratic fit of each response:
    (study, Hardness fit, Gloss fit) ids."""
    study_id = make_study(db, title=title)
    version_id = add_version(db, study_id)
    made = []
    for response in ("Hardness", "Gloss"):
        fit_id = make_fit(db, version_id, model="quadratic", response=response)
        submit(db, fit_id)
        sign(db, fit_id)
        made.append(fit_id)
    return study_id, made[0], made[1]


def add_engineers(db, *people: tuple[str, str]) -> None:
    """Engineer accounts (user name, full name), all with the tests' PASSWORD."""
    from app.workflow import accounts

    with db.transaction() as s:
        for username, name in people:
            accounts.create_user(s, None, username=username, full_name=name, roles="engineer",
                                 password=PASSWORD)


# Gloss rises with speed on M1, peaks mid-range on M2, and M3 sits lower throughout (simulated)
GLOSS_CSV = (b"Machine,Speed,Gloss\n"
             b"M2,10,81.5\nM1,20,88.0\nM3,10,78.2\nM2,20,82.9\nM1,10,80.1\nM3,20,80.3\n"
             b"M2,15,85.4\nM1,15,84.8\nM3,15,80.0\nM1,20,87.6\nM2,10,81.9\nM3,15,79.6\n"
             b"M1,10,80.5\nM2,15,85.0\nM3,20,80.9\nM2,20,83.3\nM1,15,84.2\nM3,10,78.6\n")
GLOSS_ROLES = {"Machine": ColumnRole("factor", kind="categorical"),
               "Speed": ColumnRole("factor", low=10.0, high=20.0, units="m/min"),
               "Gloss": ColumnRole("response")}


def approved_categorical_fit(db) -> tuple[int, int]:
    """A study whose approved quadratic fit of Gloss has a categorical factor (Machine, three
    levels) and a continuous one (Speed): (study, fit) ids."""
    with db.transaction() as s:
        erin = user(s, "erin")
        study = studies.create_study(s, erin, title="Gloss by machine")
        raw = read_upload(GLOSS_CSV, "gloss.csv")
        version = uploads.add_data_version(s, erin, study, data=GLOSS_CSV, filename="gloss.csv",
                                           raw=raw, table=validate(raw, GLOSS_ROLES))
        spec = fits.build_spec(version, response="Gloss", model="quadratic",
                               thresholds=Thresholds())
        study_id, fit_id = study.id, fits.create_fit(s, erin, version, spec).id
    submit(db, fit_id)
    sign(db, fit_id)
    return study_id, fit_id
