"""Fits: the model builder, the fit page with its residual checks and charts, comparisons."""

from __future__ import annotations

import json
import re
from threading import Lock
from typing import Any

import numpy as np
from flask import (
    Blueprint,
    abort,
    flash,
    g,
    jsonify,
    redirect,
    render_template,
    request,
    url_for,
)
from markupsafe import Markup
from sqlalchemy import select

from app.analysis.boxcox import LAMBDA_RANGE
from app.analysis.runstore import RunColumns
from app.analysis.spec import NAMED_MODELS, TRANSFORMS
from app.analysis.terms import Term, named_model, sort_key
from app.caches import MB, ByteCache
from app.store import audit
from app.store.db import get_session
from app.store.models import Fit
from app.web import charts, freshness, pagecache
from app.web.access import SIGNED_IN, allow
from app.web.common import attachment, id_field, me, read_session, tx
from app.workflow import WorkflowError, fits, reviews, teams, uploads

bp = Blueprint("fits", __name__)

MODEL_LABELS = {"linear": "Main effects", "interaction": "Main effects and two-factor "
                "interactions", "quadratic": "Full quadratic (interactions and squares)",
                "full": "Every interaction (two-level designs)"}
TRANSFORM_LABELS = {"none": "None", "log": "Natural log", "sqrt": "Square root",
                    "inverse": "Reciprocal (1/y)", "boxcox": "Box–Cox with a chosen λ"}
# Snapshots never change, so the charts and the page body built from one can be kept (keyed on
# its hash), within a byte budget.
_CHART_CACHE = ByteCache(64 * MB)
_BUILD_LOCK = Lock()
# Up to this many runs the page lists every run; beyond it, the flagged and excluded ones.
RUN_TABLE_ALL = 500


def chart_id(name: str) -> str:
    """An HTML id for a chart name (ids may not hold spaces): ``chart-<name>``."""
    return "chart-" + re.sub(r"[^A-Za-z0-9_:.-]", "-", name)


bp.add_app_template_filter(chart_id, "chart_id")


def candidate_terms(factor_names: list[str], two_level: bool,
                    categorical: frozenset[int] = frozenset()) -> list[dict[str, Any]]:
    """Terms the picker offers, each with the parents hierarchy needs (no square of a
    categorical factor)."""
    k = len(factor_names)
    terms = set(named_model("quadratic", k, categorical))
    if two_level and 3 <= k <= 5:
        terms |= set(named_model("full", k))
    names = tuple(factor_names)

    def kind(t: Term) -> str:
        if len(t.powers) == 1:
            return "main" if t.powers[0][1] == 1 else "square"
        return "interaction"

    return [{"name": t.name(names), "kind": kind(t),
             "parents": [p.name(names) for p in t.parents()]}
            for t in sorted(terms, key=sort_key)]


def _builder_context(version, form: dict[str, Any]) -> dict[str, Any]:
    roles = json.loads(version.roles_json)
    table = uploads.design_table(version)
    factor_names = list(table.factors)  # the upload's column order, not the sorted roles JSON
    # Two levels plus perhaps a centre: higher interactions are worth offering.
    two_level = all(len(set(table.frame[n])) <= 3 for n in factor_names)
    categorical = frozenset(i for i, n in enumerate(factor_names)
                            if table.roles[n].categorical_factor)
    two_level = two_level and not categorical
    return {"version": version, "study": version.study, "roles": roles, "table": table,
            "responses": list(table.responses),
            "factors": factor_names, "terms": candidate_terms(factor_names, two_level, categorical),
            "models": [(m, MODEL_LABELS[m]) for m in NAMED_MODELS],
            "transforms": [(t, TRANSFORM_LABELS[t]) for t in TRANSFORMS],
            "lambda_range": LAMBDA_RANGE, "form": form,
            # Beyond RUN_TABLE_ALL runs the builder lists only the runs already left out and
            # takes more as typed lines (a tick box per run would not fit the page).
            "pick_rows": None if table.n_runs <= RUN_TABLE_ALL else sorted(
                r for r in form["exclusions"] if r in table.frame.index)}


def _form_from_fit(fit: Fit) -> dict[str, Any]:
    spec = json.loads(fit.spec_json)
    return {"response": spec["response"], "mode": "named" if spec.get("model") else "terms",
            "model": spec.get("model") or "linear", "terms": list(spec.get("terms") or []),
            "hierarchy": spec.get("hierarchy", True), "transform": spec.get("transform", "none"),
            "boxcox_lambda": spec.get("boxcox_lambda"),
            "reduce": spec.get("reduce_alpha") is not None,
            "reduce_alpha": spec.get("reduce_alpha") or 0.05,
            "exclusions": {int(r): why for r, why in spec.get("exclusions") or []}}


DEFAULT_FORM = {"response": None, "mode": "named", "model": "quadratic", "terms": [],
                "hierarchy": True, "transform": "none", "boxcox_lambda": None, "reduce": False,
                "reduce_alpha": 0.05, "exclusions": {}}


@bp.route("/data/<int:version_id>/fit", methods=["GET"])
@allow("engineer")
def builder(version_id: int):
    session = get_session()
    version = uploads.get_data_version(session, version_id)
    form = dict(DEFAULT_FORM)
    start = id_field(request.args, "from", "fit")
    if start is not None:
        source = teams.fit_for(session, g.user, start)
        if source.data_version_id == version.id:
            form = _form_from_fit(source)
    return render_template("fits/builder.html", **_builder_context(version, form))


def _number(form, name: str, label: str) -> float | None:
    text = (form.get(name) or "").strip()
    if not text:
        return None
    try:
        return float(text.replace(",", "."))
    except ValueError:
        raise WorkflowError(f"{label} must be a number (got '{text}').", field=name) from None


def parse_builder_form(form) -> dict[str, Any]:
    """The builder's fields as the choices build_spec takes; bad numbers name their field."""
    mode = form.get("mode", "named")
    exclusions = {}
    for row in form.getlist("exclude"):
        exclusions[row] = (form.get(f"reason_{row}") or "").strip()
    exclusions.update(exclusion_lines(form.get("exclude_lines") or ""))
    choices: dict[str, Any] = {
        "response": form.get("response", ""),
        "model": form.get("model", "linear") if mode == "named" else None,
        "terms": form.getlist("terms") if mode == "terms" else None,
        "hierarchy": form.get("hierarchy") == "on",
        "transform": form.get("transform", "none"),
        "boxcox_lambda": None, "reduce_alpha": None, "exclusions": exclusions,
    }
    if mode == "terms" and not choices["terms"]:
        raise WorkflowError("Pick at least one term, or choose a named model.", field="terms")
    if choices["transform"] == "boxcox":
        choices["boxcox_lambda"] = _number(form, "boxcox_lambda", "Box–Cox λ")
        if choices["boxcox_lambda"] is None:
            raise WorkflowError("Box–Cox needs a value of λ (field 'Box–Cox λ').",
                                field="boxcox_lambda")
    if form.get("reduce") == "on":
        alpha = _number(form, "reduce_alpha", "Reduction α")
        if alpha is None or not 0 < alpha < 1:
            raise WorkflowError("Reduction α must be between 0 and 1.", field="reduce_alpha")
        choices["reduce_alpha"] = alpha
    return choices


def exclusion_lines(text: str) -> dict[str, str]:
    """``row: reason`` lines (``=`` works too) to {row: reason}; a bad line names itself."""
    out: dict[str, str] = {}
    for number, line in enumerate(text.splitlines(), start=1):
        if not line.strip():
            continue
        match = re.fullmatch(r"(\d+)\s*[:=]\s*(.*)", line.strip())
        if match is None:
            raise WorkflowError(f"Runs to leave out, line {number}: '{line.strip()[:60]}' must "
                                "look like 'row: reason'.", field="exclusions")
        out[match.group(1)] = match.group(2).strip()
    return out


def _echo(form) -> dict[str, Any]:
    """The submitted form, shaped like DEFAULT_FORM, to re-render the builder unchanged."""
    return {"response": form.get("response"), "mode": form.get("mode", "named"),
            "model": form.get("model", "quadratic"), "terms": form.getlist("terms"),
            "hierarchy": form.get("hierarchy") == "on", "transform": form.get("transform"),
            "boxcox_lambda": form.get("boxcox_lambda"), "reduce": form.get("reduce") == "on",
            "reduce_alpha": form.get("reduce_alpha") or 0.05,
            "exclusions": {int(r): form.get(f"reason_{r}", "") for r in form.getlist("exclude")
                           if r.isdigit()},
            "exclude_lines": form.get("exclude_lines", "")}


@bp.route("/data/<int:version_id>/fit", methods=["POST"])
@allow("engineer")
def create(version_id: int):
    with read_session() as rs:
        version = uploads.get_data_version(rs, version_id)
        try:
            choices = parse_builder_form(request.form)
            # The response chosen first, then every other one ticked: one fit each.
            also = [r for r in request.form.getlist("also") if r != choices["response"]]
            planned = [fits.plan_fit(version, **{**choices, "response": r})
                       for r in [choices["response"], *dict.fromkeys(also)]]
            with tx() as s:
                made = [fits.create_fit(s, me(s), uploads.get_data_version(s, version_id),
                                        spec, results=results) for spec, results in planned]
            fit = made[0]
        except WorkflowError as exc:
            if exc.status >= 500 or exc.status == 404:
                raise
            context = _builder_context(version, _echo(request.form))
            return render_template("fits/builder.html", error=exc.message, field=exc.field,
                                   **context), 400
    if len(made) > 1:
        flash("Fits " + ", ".join(f"{f.id} ({f.response})" for f in made) + " stored together.")
    return redirect(url_for("fits.view", fit_id=fit.id))


class ContourChoiceError(WorkflowError):
    """The contour's factor pair (query fields x and y) cannot be drawn."""


def _pair(results: dict) -> tuple[str, str] | None:
    """The contour's two factors from the query (None: the page's default pair)."""
    names = [f["name"] for f in results["factors"]]
    x, y = request.args.get("x"), request.args.get("y")
    if x is None and y is None:
        return None
    if x not in names or y not in names:
        raise ContourChoiceError(
            f"The contour's factors must be factors of this fit ({', '.join(names)}).",
            field="x" if x not in names else "y")
    if x == y:
        raise ContourChoiceError(
            f"The contour needs two different factors: “{x}” was chosen for both axes. Choose "
            "another factor for one of them.", field="y")
    named = [n for n in (x, y) if charts.level_names(results, n) is not None]
    if named:
        raise ContourChoiceError(
            f"“{named[0]}” is categorical: the contour is drawn over two continuous factors "
            "(categorical ones are averaged over their levels).",
            field="x" if named[0] == x else "y")
    return x, y


def _covariate_values(fit: Fit, results: dict) -> dict[str, dict[int, Any]]:
    names = [name for name, _ in results["spec"].get("covariates") or []]
    if not names:
        return {}
    frame = uploads.design_table(fit.data_version).frame
    rows = [int(r) for r in frame.index.tolist()]
    return {n: dict(zip(rows, frame[n].tolist(), strict=True)) for n in names if n in frame}


def fit_charts(fit: Fit, results: dict, pair: tuple[str, str] | None) -> list[charts.Chart]:
    """Charts of a stored snapshot, built once per (snapshot hash, factor pair)."""
    key = (fit.id, fit.snapshot_sha256, pair)
    cached = _cached_charts(key)
    if cached is not None:
        return cached
    # One build at a time: requests arriving during a build wait and then find it cached,
    # instead of each building the same charts (CPU-bound, so parallel builds only queue).
    with _BUILD_LOCK:
        cached = _cached_charts(key)
        if cached is not None:
            return cached
        built = charts.all_charts(results, pair=pair, cols=fits.runs_of(fit),
                                  covariates=_covariate_values(fit, results))
        _CHART_CACHE.put(key, built)
    return built


def _cached_charts(key: tuple) -> Any:
    return _CHART_CACHE.get(key)


def run_table(cols: RunColumns) -> dict[str, Any]:
    """The runs the page lists: every run up to RUN_TABLE_ALL, else the flagged and excluded
    ones (at most RUN_TABLE_ALL of them); with the counts to say so."""
    n = len(cols)
    excluded = np.flatnonzero(cols.excluded)
    flagged = np.flatnonzero(np.isin(cols.row, np.fromiter(cols.flags, dtype=np.int64,
                                                            count=len(cols.flags))))
    marked = np.union1d(flagged, excluded)
    index = np.arange(n) if n <= RUN_TABLE_ALL else marked[:RUN_TABLE_ALL]
    return {"rows": [cols.records(i, i + 1)[0] for i in index.tolist()],
            "excluded": [cols.records(i, i + 1)[0] for i in excluded.tolist()],
            "total": n, "all": n <= RUN_TABLE_ALL, "marked": len(marked)}


def _other_fits(fit: Fit) -> list[Fit]:
    return [f for f in fits.fits_of_study(get_session(), fit.study_id) if f.id != fit.id]


@bp.route("/fits/<int:fit_id>")
@allow(SIGNED_IN)
def view(fit_id: int):
    live = fits.checked_digest(get_session(), fit_id, freshness.marker())
    if live is None:
        fits.get_fit(get_session(), fit_id)  # raises the plain 404
    try:
        return pagecache.render(("fit", fit_id), lambda: _render_view(fit_id), live=live)
    except ContourChoiceError as exc:
        # the page with its default contour and the reason beside the contour's form
        return _render_view(fit_id, contour_error=exc), 400


def _render_view(fit_id: int, contour_error: ContourChoiceError | None = None) -> str:
    fit = fits.get_fit(get_session(), fit_id)
    results = fits.results_of(fit)
    pair = None if contour_error else _pair(results)
    built = fit_charts(fit, results, pair)
    names = {c.name for c in built}
    query = {} if pair is None else {"x": pair[0], "y": pair[1]}
    context = dict(fit=fit, results=results, study=fit.study, version=fit.data_version,
                   charts=built, chart_names=names, pair=pair or (None, None),
                   runs=run_table(fits.runs_of(fit)), aliases=fits.aliases_of(fit, results),
                   charts_url=url_for("fits.charts_json", fit_id=fit.id, **query))
    if contour_error is not None:
        # not cached with the snapshot body: the message belongs to this one request
        context.update(contour_error=contour_error.message, contour_field=contour_error.field)
        body = Markup(render_template("fits/_body.html", **context))  # noqa: S704
    else:
        body = _snapshot_body(context)
    return render_template(
        "fits/view.html", body=body, intact=fits.snapshot_intact(fit),
        others=_other_fits(fit), thresholds=json.loads(fit.thresholds_json), **context)


def _snapshot_body(context: dict[str, Any]) -> Markup:
    """The snapshot-only part of the fit page (tables and charts), rendered once per
    (fit, snapshot hash, contour pair): a stored snapshot never changes."""
    fit = context["fit"]
    key = ("body", fit.id, fit.snapshot_sha256, tuple(context["pair"]))
    cached = _cached_charts(key)
    if cached is None:
        # Safe: the output of an autoescaping Jinja template, not raw user text.
        cached = Markup(render_template("fits/_body.html", **context))  # noqa: S704
        _CHART_CACHE.put(key, cached)
    return cached


@bp.route("/fits/<int:fit_id>/charts.json")
@allow(SIGNED_IN)
def charts_json(fit_id: int):
    fit = fits.get_fit(get_session(), fit_id)
    results = fits.results_of(fit)
    built = fit_charts(fit, results, _pair(results))
    return jsonify({"fit": fit.id, "charts": [c.to_dict() for c in built]})


@bp.route("/fits/<int:fit_id>/results.json")
@allow(SIGNED_IN)
def results_json(fit_id: int):
    fit = fits.get_fit(get_session(), fit_id)
    # The stored bytes themselves: what the snapshot hash covers, not a re-serialisation.
    response = attachment(fit.results_json, f"fit-{fit.id}-results.json", "application/json")
    response.headers["X-Snapshot-SHA256"] = fit.snapshot_sha256
    return response


@bp.route("/fits/<int:fit_id>/record.json")
@allow(SIGNED_IN)
def record_json(fit_id: int):
    """The fit as a record: snapshot hash and its check, signatures (name, UTC time, meaning,
    validity), the chain head, and the stored inputs and results."""
    session = get_session()
    fit = fits.get_fit(session, fit_id)
    seq, head = audit.chain_head(session)
    record = {
        "fit": fit.id, "study": fit.study_id, "data_version": fit.data_version.version,
        "response": fit.response, "state": fit.state,
        "created_at": fit.created_at.isoformat(), "created_by": fit.created_by.full_name,
        "snapshot_sha256": fit.snapshot_sha256, "snapshot_intact": fits.snapshot_intact(fit),
        "signatures": reviews.signatures_json(fit),
        "chain_head": {"seq": seq, "hash": head},
        "snapshot": fits.snapshot_document(fit),
    }
    body = json.dumps(record, indent=2, sort_keys=True, ensure_ascii=False)
    return attachment(body, f"fit-{fit.id}-record.json", "application/json")


@bp.route("/fits/compare")
@allow(SIGNED_IN)
def compare():
    a, b = id_field(request.args, "a", "fit"), id_field(request.args, "b", "fit")
    if a is None or b is None:
        abort(400, description="Choose two fits to compare (query fields 'a' and 'b' are fit "
                               "numbers).")
    session = get_session()
    fit_a, fit_b = teams.fit_for(session, g.user, a), teams.fit_for(session, g.user, b)
    others = list(session.scalars(select(Fit).where(Fit.study_id == fit_a.study_id)
                                  .order_by(Fit.id)))
    return render_template("fits/compare.html", fit_a=fit_a, fit_b=fit_b,
                           cmp=fits.compare(fit_a, fit_b), others=others)
