"""Fits: the model builder, the fit page with its residual checks and charts, comparisons."""

from __future__ import annotations

import json
import re
from collections import OrderedDict
from threading import Lock
from typing import Any

from flask import (
    Blueprint,
    abort,
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
from app.analysis.spec import NAMED_MODELS, TRANSFORMS
from app.analysis.terms import Term, named_model, sort_key
from app.store import audit
from app.store.db import get_session
from app.store.models import Fit
from app.web import charts, pagecache
from app.web.access import SIGNED_IN, allow
from app.web.common import attachment, id_field, me, read_session, tx
from app.workflow import WorkflowError, fits, reviews, teams, uploads

bp = Blueprint("fits", __name__)

MODEL_LABELS = {"linear": "Main effects", "interaction": "Main effects and two-factor "
                "interactions", "quadratic": "Full quadratic (interactions and squares)",
                "full": "Every interaction (two-level designs)"}
TRANSFORM_LABELS = {"none": "None", "log": "Natural log", "sqrt": "Square root",
                    "inverse": "Reciprocal (1/y)", "boxcox": "Box–Cox with a chosen λ"}
# Snapshots never change, so the charts built from one can be kept (keyed on its hash).
_CHART_CACHE: OrderedDict[tuple, Any] = OrderedDict()
_CHART_CACHE_SIZE = 32
_CHART_LOCK = Lock()
_BUILD_LOCK = Lock()


def chart_id(name: str) -> str:
    """An HTML id for a chart name (ids may not hold spaces): ``chart-<name>``."""
    return "chart-" + re.sub(r"[^A-Za-z0-9_:.-]", "-", name)


bp.add_app_template_filter(chart_id, "chart_id")


def candidate_terms(factor_names: list[str], two_level: bool) -> list[dict[str, Any]]:
    """Terms the picker offers, each with the parents hierarchy needs."""
    k = len(factor_names)
    terms = set(named_model("quadratic", k))
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
    return {"version": version, "study": version.study, "roles": roles, "table": table,
            "responses": list(table.responses),
            "factors": factor_names, "terms": candidate_terms(factor_names, two_level),
            "models": [(m, MODEL_LABELS[m]) for m in NAMED_MODELS],
            "transforms": [(t, TRANSFORM_LABELS[t]) for t in TRANSFORMS],
            "lambda_range": LAMBDA_RANGE, "form": form}


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


def _echo(form) -> dict[str, Any]:
    """The submitted form, shaped like DEFAULT_FORM, to re-render the builder unchanged."""
    return {"response": form.get("response"), "mode": form.get("mode", "named"),
            "model": form.get("model", "quadratic"), "terms": form.getlist("terms"),
            "hierarchy": form.get("hierarchy") == "on", "transform": form.get("transform"),
            "boxcox_lambda": form.get("boxcox_lambda"), "reduce": form.get("reduce") == "on",
            "reduce_alpha": form.get("reduce_alpha") or 0.05,
            "exclusions": {int(r): form.get(f"reason_{r}", "") for r in form.getlist("exclude")
                           if r.isdigit()}}


@bp.route("/data/<int:version_id>/fit", methods=["POST"])
@allow("engineer")
def create(version_id: int):
    with read_session() as rs:
        version = uploads.get_data_version(rs, version_id)
        try:
            choices = parse_builder_form(request.form)
            spec, results = fits.plan_fit(version, **choices)
            with tx() as s:
                fit = fits.create_fit(s, me(s), uploads.get_data_version(s, version_id), spec,
                                      results=results)
        except WorkflowError as exc:
            if exc.status >= 500 or exc.status == 404:
                raise
            context = _builder_context(version, _echo(request.form))
            return render_template("fits/builder.html", error=exc.message, field=exc.field,
                                   **context), 400
    return redirect(url_for("fits.view", fit_id=fit.id))


def _pair(results: dict) -> tuple[str, str] | None:
    names = [f["name"] for f in results["factors"]]
    x, y = request.args.get("x"), request.args.get("y")
    if x is None and y is None:
        return None
    if x not in names or y not in names or x == y:
        raise WorkflowError("The contour needs two different factors for 'x' and 'y' (factors: "
                            + ", ".join(names) + ").", field="x" if x not in names else "y")
    return x, y


def _covariate_values(fit: Fit, results: dict) -> dict[str, dict[int, Any]]:
    names = [name for name, _ in results["spec"].get("covariates") or []]
    if not names:
        return {}
    frame = uploads.design_table(fit.data_version).frame
    return {n: {int(row): (v.item() if hasattr(v, "item") else v)
                for row, v in frame[n].items()} for n in names if n in frame}


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
        built = charts.all_charts(results, pair=pair, covariates=_covariate_values(fit, results))
        _remember(key, built)
    return built


def _cached_charts(key: tuple) -> Any:
    with _CHART_LOCK:
        if key in _CHART_CACHE:
            _CHART_CACHE.move_to_end(key)
            return _CHART_CACHE[key]
    return None


def _remember(key: tuple, value: Any) -> None:
    with _CHART_LOCK:
        _CHART_CACHE[key] = value
        while len(_CHART_CACHE) > _CHART_CACHE_SIZE:
            _CHART_CACHE.popitem(last=False)


def _other_fits(fit: Fit) -> list[Fit]:
    return [f for f in fits.fits_of_study(get_session(), fit.study_id) if f.id != fit.id]


@bp.route("/fits/<int:fit_id>")
@allow(SIGNED_IN)
def view(fit_id: int):
    rows = fits.checked_rows(get_session(), fit_id)
    if rows is None:
        fits.get_fit(get_session(), fit_id)  # raises the plain 404
    return pagecache.render(("fit", fit_id), lambda: _render_view(fit_id),
                            live=pagecache.rows_digest(rows))


def _render_view(fit_id: int) -> str:
    fit = fits.get_fit(get_session(), fit_id)
    results = fits.results_of(fit)
    pair = _pair(results)
    built = fit_charts(fit, results, pair)
    names = {c.name for c in built}
    query = {} if pair is None else {"x": pair[0], "y": pair[1]}
    context = dict(fit=fit, results=results, study=fit.study, version=fit.data_version,
                   charts=built, chart_names=names, pair=pair or (None, None),
                   charts_url=url_for("fits.charts_json", fit_id=fit.id, **query))
    return render_template(
        "fits/view.html", body=_snapshot_body(context), intact=fits.snapshot_intact(fit),
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
        _remember(key, cached)
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
