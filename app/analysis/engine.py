"""``analyse``: from a canonical table and a fit spec to a complete, frozen result."""

from __future__ import annotations

import numpy as np
import pandas as pd

from . import transforms
from .anova import SS_METHOD, anova_table, centre_runs, term_p_value
from .boxcox import boxcox_profile
from .calibration import ASYMPTOTIC_ABOVE, null_draws, seed_for
from .checks import CheckContext, battery_summary, run_checks
from .coding import code_factors, decode
from .design import describe_design, setting_groups
from .effects import effects_and_lenth
from .equation import equations
from .fit import coefficient_table, dependent_columns, fit_statistics, least_squares, scaled_qr
from .reduction import backward_reduce
from .residuals import residual_set
from .results import CoefficientRow, FitResult, RunTable
from .spec import AnalysisError, FitSpec
from .suggestions import collect_suggestions
from .terms import Term, block_columns, model_matrix, resolve_terms
from .version import software_version


def _require(frame: pd.DataFrame, name: str | None, role: str) -> None:
    if name is not None and name not in frame.columns:
        raise AnalysisError(f"Column '{name}' ({role}) is not in the table")


def _response(frame: pd.DataFrame, spec: FitSpec, included: np.ndarray) -> np.ndarray:
    values = pd.to_numeric(frame[spec.response], errors="coerce").to_numpy(dtype=float)
    bad = included & ~np.isfinite(values)
    if bad.any():
        rows = [int(r) for r in frame.index[bad]]
        listed = ", ".join(map(str, rows[:10])) + (f" and {len(rows) - 10} more"
                                                   if len(rows) > 10 else "")
        raise AnalysisError(
            f"Column '{spec.response}' (response) has no value in row{'s' if len(rows) > 1 else ''}"
            f" {listed}: leave {'those runs' if len(rows) > 1 else 'that run'} out of the fit "
            "with a reason (the run stays in the data version)")
    return values


def _included_mask(frame: pd.DataFrame, spec: FitSpec) -> tuple[np.ndarray, list]:
    n = len(frame.index)
    included = np.ones(n, bool)
    reasons: list = [None] * n
    # a row-number lookup only when runs are left out: most fits leave none
    position = {int(r): i for i, r in enumerate(frame.index)} if spec.exclusions else {}
    for row, reason in spec.exclusions:
        if int(row) not in position:
            raise AnalysisError(f"Exclusion names row {row}, which is not in the table")
        included[position[int(row)]] = False
        reasons[position[int(row)]] = reason
    return included, reasons


def _column_names(terms: list[Term], block_names: list[str], names: tuple[str, ...],
                  levels: dict[int, tuple[str, ...]]) -> list[str]:
    return ["Intercept"] + block_names + [c for t in terms for c in t.column_names(names, levels)]


def _term_columns(terms: list[Term], names: tuple[str, ...], first: int,
                  n_levels: dict[int, int]) -> list[tuple[str, list[int]]]:
    """(term name, its model-column indices) for each term; columns start at ``first``.

    A term is one column, times L - 1 for each categorical factor in it; the ANOVA tests all
    of a term's columns together (one row, df = its column count)."""
    out, j = [], first
    for t in terms:
        width = int(np.prod([n_levels[i] - 1 for i in t.factors if i in n_levels]))
        out.append((t.name(names), list(range(j, j + width))))
        j += width
    return out


def _aliasing_error(x: np.ndarray, labels: list[str], r: np.ndarray) -> None:
    for col, partners in dependent_columns(x, r=r):
        name = labels[col]
        if not partners or partners == [0]:
            raise AnalysisError(f"Term {name} does not vary over the runs used; drop it")
        partner_names = [labels[j] for j in partners]
        if len(partner_names) == 1:
            raise AnalysisError(
                f"{name} is aliased with {partner_names[0]} in this design; drop one")
        raise AnalysisError(
            f"{name} is aliased with a combination of {', '.join(partner_names)} in this design; "
            "drop one of them")


def _fit_terms(coded, y, terms, bcols, n_levels):
    x = model_matrix(coded, terms, bcols, n_levels)
    return x, least_squares(x, y, check_rank=False)


def analyse(frame: pd.DataFrame, spec: FitSpec) -> FitResult:
    """Fit ``spec`` to ``frame`` (index = row numbers) and run every residual check.

    Raises :class:`AnalysisError` naming the column, row or term for any input it cannot fit.
    """
    for f in spec.factors:
        _require(frame, f.name, "factor")
    _require(frame, spec.response, "response")
    _require(frame, spec.run_order, "run order")
    _require(frame, spec.block, "block")
    _require(frame, spec.label, "label")
    for name, _ in spec.covariates:
        _require(frame, name, "covariate")
    names = tuple(f.name for f in spec.factors)
    levels = {i: f.levels for i, f in enumerate(spec.factors) if f.categorical}
    n_levels = {i: len(lv) for i, lv in levels.items()}
    included, reasons = _included_mask(frame, spec)
    if not included.any():
        raise AnalysisError("Every run is excluded; nothing is left to fit")
    rows_all = np.asarray(frame.index, dtype=np.int64)
    y_raw_all = _response(frame, spec, included)
    coded_all = code_factors(frame, spec.factors)
    rows = rows_all[included]
    y_raw = y_raw_all[included]
    coded = coded_all[included]
    blocks = frame[spec.block].astype(str).to_numpy()[included] if spec.block else None
    groups = setting_groups(coded, blocks)
    design = describe_design(coded, blocks, categorical=tuple(levels), groups=groups)

    terms = resolve_terms(spec.model, spec.terms, names, spec.hierarchy,
                          categorical=frozenset(levels))
    if spec.terms is None and spec.model == "full" and not design.two_level:
        raise AnalysisError("The full model (every interaction) is for two-level designs; "
                            "choose linear, interaction or quadratic, or list terms")
    bcols, block_names, _ = block_columns(blocks) if blocks is not None else (None, [], [])
    x = model_matrix(coded, terms, bcols, n_levels)
    labels = _column_names(terms, block_names, names, levels)
    if x.shape[0] < x.shape[1]:
        raise AnalysisError(f"{x.shape[0]} runs are fewer than the {x.shape[1]} model terms "
                            f"({', '.join(labels)}) need")
    qr = scaled_qr(x)
    _aliasing_error(x, labels, qr[1])

    transforms.check_domain(y_raw, spec.transform, rows, spec.response)
    boxcox = _boxcox(y_raw, x, qr[0])
    lam = spec.boxcox_lambda
    if spec.transform == "boxcox" and lam is None:
        if boxcox.get("lambda_hat") is None:
            raise AnalysisError("Box-Cox lambda cannot be estimated here: " + boxcox["reason"])
        lam = round(boxcox["lambda_hat"], 2)
    y = transforms.forward(y_raw, spec.transform, lam)

    n_block = len(block_names)
    steps: list[dict] = []
    if spec.reduce_alpha is not None:
        def p_values(current: list[Term]) -> dict[Term, float]:
            _, ls_c = _fit_terms(coded, y, current, bcols, n_levels)
            by_term = _term_columns(current, names, 1 + n_block, n_levels)
            return {t: term_p_value(ls_c, cols)
                    for t, (_, cols) in zip(current, by_term, strict=True)}
        terms, raw_steps = backward_reduce(terms, p_values, spec.reduce_alpha, spec.hierarchy)
        steps = [{"term": s["term"].name(names), "p_value": s["p_value"]} for s in raw_steps]
        x = model_matrix(coded, terms, bcols, n_levels)
        labels = _column_names(terms, block_names, names, levels)
        qr = scaled_qr(x)

    ls = least_squares(x, y, check_rank=False, qr=qr)
    res = residual_set(ls)
    table = coefficient_table(ls, x)
    fit_stats = fit_statistics(ls, y, res.leverage)
    term_cols = _term_columns(terms, names, 1 + n_block, n_levels)
    anova = anova_table(ls, x, y, term_cols, list(range(1, 1 + n_block)), groups,
                        centre=centre_runs(design, coded))

    run_order = None
    if spec.run_order:
        run_order_all = pd.to_numeric(frame[spec.run_order], errors="coerce").to_numpy(dtype=float)
        run_order = run_order_all[included]
    covariates = {}
    for name, kind in spec.covariates:
        col = frame[name]
        vals = (pd.to_numeric(col, errors="coerce").to_numpy(dtype=float) if kind == "numeric"
                else np.array([None if pd.isna(v) else str(v) for v in col], dtype=object))
        covariates[name] = (kind, vals[included])
    ctx = CheckContext(
        rows=rows, ls=ls, resid=res, coded=coded, factor_names=names, design=design,
        groups=groups, thresholds=spec.thresholds, run_order=run_order, covariates=covariates,
        has_square_terms=any(not t.is_two_level_product() for t in terms),
        model_factor_set=frozenset(i for t in terms for i in t.factors), levels=levels,
        null=_null_draws(ls, x, spec),
    )
    checks = run_checks(ctx)
    calibration = battery_summary(checks, ctx)
    effects, lenth_doc, half_normal = effects_and_lenth(design, terms, ls, names, spec.hierarchy,
                                                        coded=coded)

    coefficients = tuple(
        CoefficientRow(labels[j], *(float(v[j]) for v in (
            table.estimate, table.std_error, table.t_value, table.p_value, table.ci_low,
            table.ci_high, table.vif)))
        for j in range(len(labels)))
    response_label = _response_label(spec.response, spec.transform, lam)
    eq = equations(response_label, float(ls.coef[0]), terms,
                   [float(c) for c in ls.coef[1 + n_block:]], spec.factors)

    runs = _run_table(frame, spec, rows_all, included, reasons, y_raw_all, coded_all, x, ls, res,
                      terms, bcols, lam, n_levels)
    transform_doc = {"name": spec.transform, "lambda": lam,
                     "label": transforms.transform_label(spec.transform, lam)}
    model_doc = {
        "terms": [_term_doc(t, names, levels) for t in terms],
        "columns": labels, "coefficients": ls.coef.tolist(), "xtx_inv": ls.xtx_inv.tolist(),
        "s": ls.s, "df_resid": ls.df_resid, "transform": spec.transform, "lambda": lam,
        "factors": [f.to_dict() for f in spec.factors], "block_columns": block_names,
    }
    suggestions = collect_suggestions(checks, boxcox, lenth_doc, spec.transform)
    return FitResult(
        software_version=software_version(), spec=spec, response=spec.response, design=design,
        terms=tuple(t.name(names) for t in terms), coefficients=coefficients, anova=tuple(anova),
        anova_method=SS_METHOD, fit=fit_stats, runs=runs, checks=tuple(checks),
        effects=tuple(effects), lenth=lenth_doc, half_normal=tuple(half_normal), equation=eq,
        transform=transform_doc, boxcox=boxcox, suggestions=tuple(suggestions), model=model_doc,
        reduction=tuple(steps), calibration=calibration,
    )


def _term_doc(term: Term, names: tuple[str, ...], levels: dict[int, tuple[str, ...]]) -> dict:
    doc = {"name": term.name(names), "powers": [[names[f], p] for f, p in term.powers]}
    if any(i in levels for i in term.factors):
        doc["columns"] = term.column_names(names, levels)
    return doc


def _null_draws(ls, x: np.ndarray, spec: FitSpec):
    """Simulated M z for this design; None when not needed.

    The seed comes from the model matrix and the fit spec, both part of the snapshot, and not
    from the response: the null distribution belongs to the design, and so the same data in
    other units or with an offset get the very same p-values.
    """
    if ls.n > ASYMPTOTIC_ABOVE or ls.df_resid <= 0 or ls.exact_fit:
        return None
    import json

    seed = seed_for(x, text=json.dumps(spec.to_dict(), sort_keys=True, default=str))
    return null_draws(ls.q, seed)


def _response_label(response: str, transform: str, lam: float | None) -> str:
    if transform == "none":
        return response
    if transform == "boxcox":
        return f"boxcox({response}; lambda={lam:g})"
    return {"log": "ln", "sqrt": "sqrt", "inverse": "1/"}[transform] + (
        f"({response})" if transform != "inverse" else response)


def _boxcox(y_raw: np.ndarray, x: np.ndarray, q: np.ndarray) -> dict:
    return boxcox_profile(y_raw, q).to_dict()


def _run_table(frame, spec, rows_all, included, reasons, y_raw_all, coded_all, x_in, ls, res,
               terms, bcols, lam, n_levels) -> RunTable:
    n_all = len(rows_all)
    full = lambda: np.full(n_all, np.nan)  # noqa: E731
    fitted, resid = full(), full()
    std, stud, dele, lev, cook, dff = full(), full(), full(), full(), full(), full()
    idx = np.flatnonzero(included)
    fitted[idx], resid[idx] = ls.fitted, ls.residuals
    std[idx], stud[idx], dele[idx] = res.standardized, res.studentized, res.deleted_studentized
    lev[idx], cook[idx], dff[idx] = res.leverage, res.cooks_distance, res.dffits
    y_model = np.full(n_all, np.nan)
    with np.errstate(all="ignore"):
        ok = np.isfinite(y_raw_all)
        if spec.transform in ("log", "inverse", "boxcox"):
            ok &= y_raw_all > 0
        elif spec.transform == "sqrt":
            ok &= y_raw_all >= 0
        y_model[ok] = transforms.forward(y_raw_all[ok], spec.transform, lam)
    out_idx = np.flatnonzero(~included)
    if len(out_idx):
        zero_blocks = None if bcols is None else np.zeros((len(out_idx), bcols.shape[1]))
        x_out = model_matrix(coded_all[out_idx], terms, zero_blocks, n_levels)
        fitted[out_idx] = x_out @ ls.coef
        resid[out_idx] = y_model[out_idx] - fitted[out_idx]
    run_order = None
    if spec.run_order:
        ro = pd.to_numeric(frame[spec.run_order], errors="coerce").to_numpy(dtype=float)
        run_order = ro
    label = [None if pd.isna(v) else str(v) for v in frame[spec.label]] if spec.label else None
    return RunTable(
        row=rows_all, run_order=run_order, label=label, observed=y_raw_all,
        response_model_scale=y_model, fitted=fitted, residual=resid, standardized=std,
        studentized=stud, deleted_studentized=dele, leverage=lev, cooks_distance=cook,
        dffits=dff, excluded=~included, exclusion_reason=reasons, coded=coded_all,
        actual=decode(coded_all, spec.factors), factor_names=tuple(f.name for f in spec.factors),
    )
