"""Plans: an experiment designed in the study before it is run, its run sheet, and the data
versions uploaded against it.

A plan is built and evaluated by app.analysis.plans, stored with the request that made it and
the SHA-256 of all three (sealed with the integrity key), and never changed. Its run sheet lists
run order, run label, block, the settings in natural units (the column header carries the units
in square brackets) and blank response columns. An upload may name its plan: the roles then come
from the plan, and every setting run is compared with the planned one (app.analysis.plan_check);
the link and the tolerance are stored with the data version in the same transaction and event.
"""

from __future__ import annotations

import csv
import hashlib
import io
import json
import re
from typing import Any

from sqlalchemy import select
from sqlalchemy.orm import Session

from app.analysis.plan_check import PlanMismatch, compare, tolerances
from app.ingest import ColumnRole
from app.store import audit
from app.store.audit import canonical_json
from app.store.keys import sealing_ring
from app.store.models import DataVersion, Plan, PlanUpload, Study, User
from app.workflow import NotFound, WorkflowError, csvsafe, in_id_range, teams

RUN_ORDER, RUN_LABEL, BLOCK = "Run order", "Run label", "Block"
DEFAULT_RESPONSE = "Response"
REQUEST_FIELDS = ("design", "factors", "runs", "centre_points", "axial", "blocks",
                  "replicates", "seed", "generators", "responses", "model", "effect", "sigma")


def _engine():
    # The planning engine loads with the first plan, not with every page.
    from app.analysis import plans as engine

    return engine


def plan_sha256(plan: Plan) -> str:
    """SHA-256 over what a plan is: its study, request, built design and evaluation."""
    return hashlib.sha256(canonical_json({
        "study_id": plan.study_id, "request": json.loads(plan.request_json),
        "plan": json.loads(plan.plan_json), "evaluation": json.loads(plan.evaluation_json)}
    ).encode()).hexdigest()


def plan_intact(plan: Plan) -> bool:
    return plan_sha256(plan) == plan.sha256


def _responses(request: dict) -> list[str]:
    names = request.get("responses") or [DEFAULT_RESPONSE]
    if not isinstance(names, list) or not all(isinstance(n, str) and n.strip() for n in names):
        raise WorkflowError("responses must be a list of column names.", field="responses")
    return [n.strip() for n in names]


def create_plan(session: Session, actor: User, study: Study, request: dict[str, Any]) -> Plan:
    """Build, evaluate and store a plan in ``study`` (an engineer on its team), audited."""
    teams.require_act(session, actor, study, "plan an experiment in it")
    if not isinstance(request, dict):
        raise WorkflowError("The plan request must be an object.", field="body")
    unknown = sorted(set(request) - set(REQUEST_FIELDS))
    if unknown:
        raise WorkflowError(f"Unknown field '{unknown[0]}' in the plan request.",
                            field=unknown[0])
    engine = _engine()
    responses = _responses(request)
    options = {k: request[k] for k in ("runs", "centre_points", "axial", "blocks", "replicates",
                                       "seed", "generators") if request.get(k) is not None}
    try:
        built = engine.build_plan(request.get("design"), request.get("factors"), **options)
        evaluation = engine.evaluate_plan(
            built, **{k: request[k] for k in ("model", "effect", "sigma")
                      if request.get(k) is not None})
    except engine.PlanError as exc:
        raise WorkflowError(str(exc), field=getattr(exc, "field", None)) from None
    stored_request = {**request, "responses": responses, "seed": built["seed"]}
    plan = Plan(study_id=study.id, design=built["design"],
                request_json=canonical_json(stored_request), plan_json=canonical_json(built),
                evaluation_json=canonical_json(evaluation), sha256="",
                created_by_id=actor.id)
    plan.sha256 = plan_sha256(plan)
    plan.key_id, plan.seal = sealing_ring(session).seal("plan", plan.sha256)
    session.add(plan)
    session.flush()
    audit.record(session, actor=actor, action="plan.create", object_type="plan",
                 object_id=plan.id, study_id=study.id,
                 new={"design": plan.design, "runs": len(built["runs"]), "seed": built["seed"],
                      "factors": [f["name"] for f in built["factors"]],
                      "generators": built.get("generators"), "sha256": plan.sha256})
    return plan


def get_plan(session: Session, plan_id: int) -> Plan:
    plan = session.get(Plan, plan_id) if in_id_range(plan_id) else None
    if plan is None:
        raise NotFound(f"No plan {plan_id}.", field="plan")
    return plan


def plans_of_study(session: Session, study_id: int) -> list[Plan]:
    return list(session.scalars(select(Plan).where(Plan.study_id == study_id)
                                .order_by(Plan.id.desc())))


def document(plan: Plan) -> dict[str, Any]:
    return json.loads(plan.plan_json)


def request_of(plan: Plan) -> dict[str, Any]:
    return json.loads(plan.request_json)


def evaluation_of(plan: Plan) -> dict[str, Any]:
    return json.loads(plan.evaluation_json)


# ---- the run sheet ---------------------------------------------------------------------------

def factor_header(factor: dict) -> str:
    """A settings column's header: the factor's name, its units in square brackets."""
    units = (factor.get("units") or "").strip()
    return f"{factor['name']} [{units}]" if units else factor["name"]


def sheet_table(built: dict[str, Any], responses: list[str]
                ) -> tuple[list[str], list[list[Any]]]:
    """Header and rows of a run sheet for a built plan (app.analysis.plans), in run order."""
    factors = built["factors"]
    blocked = len({r.get("block") for r in built["runs"]}) > 1
    header = [RUN_ORDER, RUN_LABEL, *([BLOCK] if blocked else []),
              *(factor_header(f) for f in factors), *responses]
    # Settings to six significant figures (an axial run at 143.182, not 143.1820716949257):
    # far inside any tolerance a run is compared with, and what a plant can set.
    rows = [[run["run_order"], run["label"], *([run.get("block")] if blocked else []),
             *(_setting(run["settings"][f["name"]]) for f in factors), *([""] * len(responses))]
            for run in sorted(built["runs"], key=lambda r: r["run_order"])]
    return header, rows


def _setting(value: Any) -> Any:
    return float(f"{value:.6g}") if isinstance(value, float) else value


def sheet_rows(plan: Plan) -> tuple[list[str], list[list[Any]]]:
    """Header and rows of a stored plan's run sheet."""
    return sheet_table(document(plan), _responses(request_of(plan)))


def table_csv(header: list[str], rows: list[list[Any]]) -> str:
    out = io.StringIO()
    writer = csv.writer(out, lineterminator="\n")
    writer.writerow([csvsafe.neutralise(h) for h in header])
    for row in rows:
        writer.writerow([csvsafe.neutralise(v) if isinstance(v, str) else v for v in row])
    return out.getvalue()


def sheet_csv(plan: Plan) -> str:
    return table_csv(*sheet_rows(plan))


def sheet_xlsx(plan: Plan) -> bytes:
    from openpyxl import Workbook

    header, rows = sheet_rows(plan)
    book = Workbook()
    sheet = book.active
    sheet.title = "Run sheet"
    sheet.append(header)
    for row in rows:
        sheet.append([None if v == "" else v for v in row])
    out = io.BytesIO()
    book.save(out)
    return out.getvalue()


# ---- results against a plan ------------------------------------------------------------------

def _factor_column(columns: list[str], factor: dict) -> str | None:
    for name in columns:
        bare = re.sub(r"\s*\[[^\]]*\]\s*$", "", name)
        if name == factor["name"] or bare == factor["name"]:
            return name
    return None


def roles_from_plan(plan: Plan, columns: list[str]) -> dict[str, ColumnRole]:
    """Roles for an upload run from ``plan``: its factors (with the plan's low, high and
    units), run order, run label and block by their sheet headers; every other column a
    response. Refuses, naming the factor, a table without a planned factor's column."""
    built = document(plan)
    roles: dict[str, ColumnRole] = {}
    for f in built["factors"]:
        column = _factor_column(columns, f)
        if column is None:
            raise WorkflowError(f"The file has no column for the planned factor '{f['name']}' "
                                f"(expected '{factor_header(f)}').", field=f["name"])
        if f.get("levels"):
            roles[column] = ColumnRole("factor", kind="categorical")
        else:
            roles[column] = ColumnRole("factor", units=f.get("units") or None,
                                       low=float(f["low"]), high=float(f["high"]))
    known = {RUN_ORDER: "run_order", RUN_LABEL: "label", BLOCK: "block"}
    for name in columns:
        if name not in roles:
            roles[name] = ColumnRole(known.get(name, "response"))
    return roles


def _renamed(table_frame, plan: Plan):
    """The table's factor columns under the plan's factor names (headers carry units)."""
    columns = list(table_frame.columns)
    mapping = {}
    for f in document(plan)["factors"]:
        column = _factor_column(columns, f)
        if column is not None and column != f["name"]:
            mapping[column] = f["name"]
    return table_frame.rename(columns=mapping)


def check_upload(plan: Plan, table, tolerance: dict | None = None) -> dict[str, Any]:
    """Compare a validated table (app.ingest.DesignTable) with ``plan``."""
    built = document(plan)
    try:
        limits = tolerances(built, tolerance)
        return compare(built, _renamed(table.frame, plan), label=table.label,
                       run_order=table.run_order, tolerance=limits)
    except PlanMismatch as exc:
        raise WorkflowError(str(exc), field=exc.field) from None


def require_in_study(plan: Plan | None, study_id: int, named: str) -> Plan:
    """The one rule for an upload naming a plan: it must be a plan of the upload's study
    (``named`` is the id as given, for the message)."""
    if plan is None or plan.study_id != study_id:
        raise WorkflowError(f"Plan {named} is not a plan of this study.", field="plan_id")
    return plan


def link_upload(session: Session, version: DataVersion, plan: Plan,
                tolerance: dict[str, float]) -> PlanUpload:
    """Record that ``version`` was run from ``plan`` (inside the upload's transaction)."""
    require_in_study(plan, version.study_id, str(plan.id))
    link = PlanUpload(data_version_id=version.id, plan_id=plan.id,
                      tolerance_json=canonical_json(tolerance))
    session.add(link)
    session.flush()
    return link


def plan_of(session: Session, version: DataVersion) -> PlanUpload | None:
    return session.get(PlanUpload, version.id)


def deviations(session: Session, version: DataVersion, table=None) -> dict[str, Any] | None:
    """The comparison of ``version`` (its validated ``table``, loaded when not given) with its
    plan, or None when it names no plan."""
    link = plan_of(session, version)
    if link is None:
        return None
    if table is None:
        from app.workflow.uploads import design_table

        table = design_table(version)
    report = check_upload(link.plan, table, json.loads(link.tolerance_json))
    built = document(link.plan)
    return {"plan_id": link.plan_id, "seed": built.get("seed"),
            "randomised": True, "plan_intact": plan_intact(link.plan), **report}
