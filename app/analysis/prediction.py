"""Predictions from a stored result document alone: value, 95 % CI and PI, back-transformed.

The prediction interval covers one future observation (m = 1) or the mean of m future
observations at the same settings (``m`` > 1), which is what confirmation runs are judged by.
"""

from __future__ import annotations

from typing import Any

import numpy as np
from scipy import special

from . import transforms
from .spec import AnalysisError
from .terms import Term, model_matrix


def _model_doc(result: Any) -> dict:
    if hasattr(result, "to_dict") and hasattr(result, "model"):
        return result.model
    if isinstance(result, dict) and "model" in result and "coefficients" in result["model"]:
        return result["model"]
    if isinstance(result, dict) and "coefficients" in result and "xtx_inv" in result:
        return result
    raise AnalysisError("predict needs a fit result, its to_dict() document, or its 'model' part")


def predict(result: Any, settings: dict[str, float], level: float = 0.95, m: int = 1) -> dict:
    """Predicted response at ``settings`` (actual units, one value per factor; a level name
    for a categorical factor).

    Computes x'b on the model scale, the confidence interval x'b ± t s sqrt(x'Vx) and the
    prediction interval x'b ± t s sqrt(1/m + x'Vx) with V = (X'X)^-1 and n - p df, averaging
    over blocks (effect-coded block columns at 0). ``m`` is the number of future observations
    whose mean the prediction interval is for (1: a single observation); it is returned as
    ``m``. For a transformed response the value and interval ends are back-transformed (the
    value is then the median, not the mean, on the original scale; with m > 1 the interval is
    for the back-transformed mean of the m transformed values, e.g. their geometric mean under
    log). Verified against statsmodels get_prediction in tests/analysis/test_engine.py (m = 1)
    and against the published interval for the mean of m new observations in
    tests/analysis/test_confirm.py.
    """
    if isinstance(m, bool) or not isinstance(m, (int, np.integer)) or m < 1:
        raise AnalysisError(f"m (the number of future observations averaged) must be a whole "
                            f"number of at least 1, not {m!r}")
    model = _model_doc(result)
    factors = model["factors"]
    missing = [f["name"] for f in factors if f["name"] not in settings]
    if missing:
        raise AnalysisError(f"Settings need a value for factor(s): {', '.join(missing)}")
    coded = {f["name"]: _coded_setting(f, settings[f["name"]]) for f in factors}
    x = model_row(model, coded)
    b = np.asarray(model["coefficients"], dtype=float)
    v = np.asarray(model["xtx_inv"], dtype=float)
    fit = float(x @ b)
    s = model.get("s")
    df = int(model["df_resid"])
    if s is None or not np.isfinite(s) or df <= 0:
        ci = pi = (None, None)
        se_fit = None
    else:
        t = float(special.stdtrit(df, 0.5 + level / 2.0))
        lev = float(x @ v @ x)
        se_fit = float(s * np.sqrt(lev))
        ci = (fit - t * se_fit, fit + t * se_fit)
        half_pi = float(t * s * np.sqrt(1.0 / m + lev))
        pi = (fit - half_pi, fit + half_pi)
    transform, lam = model.get("transform", "none"), model.get("lambda")
    out = {"predicted_model_scale": fit, "ci_model_scale": list(ci), "pi_model_scale": list(pi),
           "se_fit": se_fit, "coded": coded, "level": level, "transform": transform,
           "m": int(m)}
    out["predicted"] = _back(fit, transform, lam)
    out["ci"] = _back_interval(ci, transform, lam)
    out["pi"] = _back_interval(pi, transform, lam)
    return out


def _coded_setting(factor: dict, value: Any) -> float | str:
    """A setting in coded units; a categorical factor's setting is one of its level names
    (returned as the name)."""
    name = factor["name"]
    if factor.get("levels") is not None:
        if str(value) not in factor["levels"]:
            raise AnalysisError(f"Setting for '{name}' must be one of its levels "
                                f"({', '.join(factor['levels'])}), not {value!r}")
        return str(value)
    try:
        v = float(value)
    except (TypeError, ValueError) as err:
        raise AnalysisError(f"Setting for '{name}' is not a number") from err
    if factor.get("low") is None:
        return v
    centre = (factor["low"] + factor["high"]) / 2.0
    return (v - centre) / ((factor["high"] - factor["low"]) / 2.0)


def model_row(model: dict, coded: dict[str, float | str]) -> np.ndarray:
    """The model-matrix row at coded settings (level names for categorical factors), blocks
    averaged out (their sum-to-zero columns at 0), built by the same code as the fit's."""
    values = {f["name"]: np.array([float(f["levels"].index(coded[f["name"]]) + 1)
                                   if f.get("levels") else float(coded[f["name"]])])
              for f in model["factors"]}
    return model_rows(model, values)[0]


def model_rows(model: dict, values: dict[str, np.ndarray]) -> np.ndarray:
    """Model-matrix rows for arrays of coded settings (level numbers 1..L for a categorical
    factor), blocks averaged out."""
    factors = model["factors"]
    index = {f["name"]: i for i, f in enumerate(factors)}
    n_levels = {i: len(f["levels"]) for i, f in enumerate(factors) if f.get("levels")}
    coded = np.column_stack([np.asarray(values[f["name"]], dtype=float).ravel()
                             for f in factors])
    terms = [Term(tuple((index[n], int(p)) for n, p in t["powers"])) for t in model["terms"]]
    blocks = np.zeros((coded.shape[0], len(model.get("block_columns", []))))
    return model_matrix(coded, terms, blocks, n_levels)


def new_run_scores(model: dict, values: dict[str, np.ndarray], residual: np.ndarray
                   ) -> tuple[np.ndarray, np.ndarray]:
    """For runs that did not enter the fit (left out with a reason): each run's leverage as a
    new point, h0 = x0'(X'X)^-1 x0, and its residual divided by the standard error of
    predicting a new observation there, s·sqrt(1 + h0).

    The second is on the scale of a deleted (externally studentized) residual: the run took no
    part in the fit, so its residual is a prediction error, as a deleted residual is.
    ``values`` are coded settings (level numbers 1..L for a categorical factor), ``residual``
    observed minus predicted on the model scale. NaN where s is unknown. Checked against
    statsmodels' get_prediction (se_obs) in tests/web/test_charts.py.
    """
    rows = model_rows(model, values)
    v = np.asarray(model["xtx_inv"], dtype=float)
    lev = np.einsum("ij,jk,ik->i", rows, v, rows)
    s = model.get("s")
    if s is None or not np.isfinite(s) or int(model["df_resid"]) <= 0:
        return lev, np.full(len(lev), np.nan)
    return lev, np.asarray(residual, dtype=float) / (s * np.sqrt(1.0 + lev))


def _back(z: float | None, transform: str, lam: float | None) -> float | None:
    if z is None:
        return None
    v = float(transforms.inverse(z, transform, lam))
    return v if np.isfinite(v) else None


def _back_interval(interval, transform: str, lam: float | None) -> list:
    lo, hi = (_back(interval[0], transform, lam), _back(interval[1], transform, lam))
    if transforms.is_decreasing(transform, lam):
        lo, hi = hi, lo
    return [lo, hi]
