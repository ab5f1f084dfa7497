"""Upload → preview with suggested roles → confirm → immutable data version."""

from __future__ import annotations

import csv
import io
import json

from flask import (
    Blueprint,
    abort,
    current_app,
    flash,
    g,
    redirect,
    render_template,
    request,
    url_for,
)
from sqlalchemy import select

from app.ingest import (
    ColumnRole,
    IngestError,
    RawTable,
    UploadTooLarge,
    read_upload,
    suggest_with_reasons,
    summarize_column,
    with_carried,
)
from app.ingest.diff import MATCHED_BY_WORDS
from app.store.db import get_session
from app.store.models import DataVersion
from app.web import staging
from app.web.access import SIGNED_IN, allow
from app.web.common import attachment, id_field, me, tx
from app.workflow import WorkflowError, fits, plans, studies, uploads
from app.workflow.csvsafe import safe_csv

bp = Blueprint("data", __name__)

ROLE_CHOICES = ("factor", "factor_categorical", "response", "run_order", "block", "covariate",
                "label", "ignore")
# What the role list shows for a choice whose name is not its words.
ROLE_WORDS = {"factor_categorical": "factor (categorical)"}


def role_choice(role: ColumnRole | None) -> str | None:
    """The preview's role choice for a column role (a categorical factor has its own)."""
    if role is None:
        return None
    return "factor_categorical" if role.categorical_factor else role.role
# The version page lists this many changed cells; the CSV holds them all.
DIFF_SHOWN = 50
# The preview shows this many rows and a summary of every column, never the whole table.
PREVIEW_ROWS = 20


def _limits() -> dict[str, int]:
    cfg = current_app.config
    return {"max_bytes": int(cfg["MAX_UPLOAD_BYTES"]), "max_cells": int(cfg["MAX_UPLOAD_CELLS"])}


def _has_versions(study_id: int) -> bool:
    return get_session().scalar(select(DataVersion.id).where(DataVersion.study_id == study_id)
                                .limit(1)) is not None


@bp.route("/studies/<int:study_id>/upload", methods=["GET"])
@allow("engineer")
def upload_form(study_id: int):
    study = studies.get_study(get_session(), study_id)
    return render_template("data/upload.html", study=study, problems=[],
                           needs_reason=_has_versions(study_id),
                           plans=plans.plans_of_study(get_session(), study_id),
                           chosen=request.args.get("plan", ""))


@bp.route("/studies/<int:study_id>/upload", methods=["POST"])
@allow("engineer")
def upload(study_id: int):
    study = studies.get_study(get_session(), study_id)
    file = request.files.get("file")
    if file is None or not file.filename:
        return render_template(
            "data/upload.html", study=study, needs_reason=_has_versions(study_id),
            problems=[{"message": "Choose a file to upload (field 'file')."}]), 400
    data = file.read()
    try:
        raw = read_upload(data, file.filename, None, **_limits())
    except UploadTooLarge as exc:
        return render_template(
            "data/upload.html", study=study, needs_reason=_has_versions(study_id),
            problems=[p.to_dict() for p in exc.problems]), 413
    except IngestError as exc:
        return render_template(
            "data/upload.html", study=study, needs_reason=_has_versions(study_id),
            problems=[p.to_dict() for p in exc.problems]), 400
    token = staging.stage(data, file.filename, g.user.id, study_id)
    return redirect(url_for("data.preview", study_id=study_id, token=token,
                            sheet=raw.sheet or None,
                            plan=request.form.get("plan_id") or None))


def _chosen_plan(study_id: int, text: str | None):
    """The plan an upload names (one of this study's), or None."""
    text = (text or "").strip()
    if not text:
        return None
    plan = plans.get_plan(get_session(), int(text)) if text.isdigit() else None
    return plans.require_in_study(plan, study_id, text)


def _staged_raw(study_id: int, token: str, sheet: str | None):
    staged = staging.load(token, g.user.id, study_id)
    if staged is None:
        abort(404, description="That upload has expired or belongs to someone else; upload the "
                               "file again.")
    return staged, read_upload(staged.data, staged.filename, sheet or None, **_limits())


def _preview_page(study, staged, raw: RawTable, roles: dict[str, ColumnRole] | None, problems,
                  status=200, plan=None):
    """The preview: roles to confirm (the suggested ones when ``roles`` is None, the plan's
    when the upload names one), a summary of every column and the first ``PREVIEW_ROWS``
    rows."""
    head = raw.frame.head(PREVIEW_ROWS)
    reasoned = suggest_with_reasons(raw)
    suggested = {column: role for column, (role, _why) in reasoned.items()}
    if roles is None and plan is not None:
        try:
            roles = plans.roles_from_plan(plan, [str(c) for c in raw.frame.columns])
        except WorkflowError as exc:
            problems = [*problems, {"message": exc.message, "column": exc.field}]
    carried_from = None
    if roles is None:
        # a new version of the study: its columns keep the roles confirmed last time
        version, carried = uploads.carried_roles(get_session(), study.id,
                                                 [str(c) for c in raw.frame.columns])
        roles = with_carried(suggested, carried)
        carried_from = version if carried else None
    summary = [(summarize_column(raw, c), role_choice(suggested[c]), reasoned[c][1])
               for c in raw.frame.columns]
    return render_template(
        "data/preview.html", study=study, staged=staged, raw=raw, roles=roles,
        columns=list(raw.frame.columns), rows=head.itertuples(), n_rows=len(raw.frame),
        n_shown=len(head), summary=summary,
        role_choices=ROLE_CHOICES, role_words=ROLE_WORDS, role_choice=role_choice,
        problems=problems, needs_reason=_has_versions(study.id),
        reason=request.form.get("reason", ""), plan=plan, carried_from=carried_from), status


@bp.route("/studies/<int:study_id>/upload/<token>", methods=["GET"])
@allow("engineer")
def preview(study_id: int, token: str):
    study = studies.get_study(get_session(), study_id)
    try:
        staged, raw = _staged_raw(study_id, token, request.args.get("sheet"))
    except IngestError as exc:
        return render_template(
            "data/upload.html", study=study, needs_reason=_has_versions(study_id),
            problems=[p.to_dict() for p in exc.problems]), 400
    try:
        plan = _chosen_plan(study_id, request.args.get("plan"))
    except WorkflowError as exc:
        return _preview_page(study, staged, raw, None, [{"message": exc.message}], 400)
    return _preview_page(study, staged, raw, None, [], plan=plan)


def roles_from_form(form, columns: list[str]) -> dict[str, ColumnRole]:
    """Column roles as the user confirmed them; a bad number names its column."""
    roles: dict[str, ColumnRole] = {}
    problems = []
    for i, name in enumerate(columns):
        role = form.get(f"role_{i}", "ignore")
        if role not in ROLE_CHOICES:
            problems.append(f"Column '{name}': unknown role '{role}'.")
            role = "ignore"
        levels: dict[str, float | None] = {}
        for key in ("low", "high"):
            text = (form.get(f"{key}_{i}") or "").strip()
            if role == "factor" and text:
                try:
                    levels[key] = float(text.replace(",", "."))
                except ValueError:
                    problems.append(f"Column '{name}': declared {key} level '{text}' is not a "
                                    "number.")
        units = (form.get(f"units_{i}") or "").strip() or None
        if role == "factor_categorical":
            # levels are the column's own names; low and high do not apply
            roles[name] = ColumnRole(role="factor", units=units, kind="categorical")
            continue
        roles[name] = ColumnRole(role=role, units=units,
                                 low=levels.get("low"), high=levels.get("high"),
                                 kind=(form.get(f"kind_{i}") or "numeric")
                                 if role == "covariate" else None)
    if problems:
        from app.ingest import Problem

        raise IngestError([Problem(message=m, row=None, column=None) for m in problems])
    return roles


@bp.route("/studies/<int:study_id>/upload/<token>", methods=["POST"])
@allow("engineer")
def confirm(study_id: int, token: str):
    session = get_session()
    study = studies.get_study(session, study_id)
    sheet = request.form.get("sheet") or None
    staged, raw = _staged_raw(study_id, token, sheet)
    columns = list(raw.frame.columns)
    try:
        plan = _chosen_plan(study_id, request.form.get("plan_id"))
        roles = roles_from_form(request.form, columns)
    except WorkflowError as exc:
        return _preview_page(study, staged, raw, None, [{"message": exc.message}], 400)
    except IngestError as exc:
        return _preview_page(study, staged, raw, None,
                             [p.to_dict() for p in exc.problems], 400, plan=plan)
    try:
        from app.ingest import validate

        table = validate(raw, roles)
        with tx() as s:
            version = uploads.add_data_version(
                s, me(s), studies.get_study(s, study_id), data=staged.data,
                filename=staged.filename, raw=raw, table=table,
                reason=request.form.get("reason"),
                plan=None if plan is None else plans.get_plan(s, plan.id))
    except IngestError as exc:
        return _preview_page(study, staged, raw, roles, [p.to_dict() for p in exc.problems], 400,
                             plan=plan)
    except WorkflowError as exc:
        return _preview_page(study, staged, raw, roles, [{"message": exc.message,
                                                          "column": exc.field}], exc.status,
                             plan=plan)
    staging.discard(token)
    flash(f"Data version {version.version} stored ({version.n_rows} runs).")
    return redirect(url_for("data.view", version_id=version.id))


@bp.route("/data/<int:version_id>")
@allow(SIGNED_IN)
def view(version_id: int):
    session = get_session()
    version = uploads.get_data_version(session, version_id)
    table = uploads.design_table(version)
    version_fits = fits.fits_of_version(session, version.id)
    against, diff = uploads.version_differences(session, version)
    return render_template("data/view.html", version=version, study=version.study, table=table,
                           plan_check=plans.deviations(session, version, table),
                           # file order (the stored JSON is sorted): the table's columns,
                           # then the ignored ones, which the stored table does not keep
                           roles=table.roles, fits=version_fits, against=against,
                           diff=diff, diff_shown=DIFF_SHOWN, matched_words=MATCHED_BY_WORDS,
                           read_info=json.loads(version.read_info_json),
                           fit_url=url_for("fits.builder", version_id=version.id))


@bp.route("/data/<int:version_id>/original")
@allow(SIGNED_IN)
def original(version_id: int):
    version = uploads.get_data_version(get_session(), version_id)
    return attachment(version.original_bytes, version.filename, "application/octet-stream")


@bp.route("/data/<int:version_id>/canonical.csv")
@allow(SIGNED_IN)
def canonical(version_id: int):
    version = uploads.get_data_version(get_session(), version_id)
    name = f"study{version.study_id}_v{version.version}_canonical.csv"
    # Text cells that a spreadsheet would run as formulas get a leading apostrophe; the stored
    # bytes (and their SHA-256) are unchanged and are in the record package as they are.
    return attachment(safe_csv(version.canonical_csv), name, "text/csv")


@bp.route("/data/<int:version_id>/differences.csv")
@allow(SIGNED_IN)
def differences_csv(version_id: int):
    """Every difference from the previous version (or ``?against=``) as CSV."""
    session = get_session()
    version = uploads.get_data_version(session, version_id)
    against, diff = uploads.version_differences(
        session, version, id_field(request.args, "against", "data version"))
    if diff is None:
        abort(404, description=f"Data version {version.version} is the study's first; there is "
                               "nothing to compare it with.")
    out = io.StringIO(newline="")
    writer = csv.writer(out, lineterminator="\n")
    writer.writerow(diff.CSV_HEADER)
    writer.writerows(["" if v is None else v for v in row] for row in diff.csv_rows())
    name = f"study{version.study_id}_v{against.version}_to_v{version.version}_differences.csv"
    return attachment(safe_csv(out.getvalue().encode("utf-8")), name, "text/csv")
