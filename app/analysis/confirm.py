"""Judging confirmation runs: the mean of m runs against the interval for the mean of m.

A model predicts the mean response at a setting; m confirmation runs estimate it with their own
mean. Comparing each run with the single-observation prediction interval tests the wrong
quantity and fails sets whose mean agrees with the model (with three runs at 95 %, about one set
in seven has some run outside). The rule here, for each response:

    mean of the m observed values  in  x'b ± t(1 − α/2, n − p) · s · sqrt(1/m + x'(X'X)⁻¹x)

at the settings actually run (the prediction interval for the mean of m new observations;
Montgomery, *Design and Analysis of Experiments*, and Neter, Kutner, Nachtsheim & Wasserman,
*Applied Linear Statistical Models*, "prediction of the mean of m new observations" — the form
recalled from memory and checked by recomputation from a statsmodels OLS fit in
tests/analysis/test_confirm.py). Each run against the single-observation interval is reported as
information and never decides the verdict.

For a transformed response the rule is applied on the model scale (the mean of the transformed
values against the model-scale interval) and both are shown back-transformed; under log the
judged mean is the geometric mean of the runs.

Settings: where the runs record a factor, its mean over the runs is used; a factor they do not
record is assumed at its released value and the document says so. A run set whose settings
differ from each other, or from the released settings, by more than the tolerance the approver
set at release is refused: :func:`judge_confirmation` raises :class:`ConfirmationRefused` (an
AnalysisError naming the factor), so no verdict is ever made from such a set. A factor without
a tolerance has no limit, and its deviation is still shown.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from . import transforms
from .prediction import _model_doc, predict
from .spec import AnalysisError

__all__ = ["ConfirmationRefused", "judge_confirmation", "rule_sentence"]


class ConfirmationRefused(AnalysisError):
    """The runs cannot be judged against these setpoints: ``factor`` names why."""

    def __init__(self, message: str, *, factor: str) -> None:
        super().__init__(message)
        self.factor = factor


def rule_sentence(level: float = 0.95) -> str:
    """The rule in words, as the page prints it."""
    pct = f"{100 * level:g} %"
    return (f"For each response the mean of the m confirmation runs must lie inside the {pct} "
            "prediction interval for the mean of m future observations, computed at the "
            "settings actually run (ends included); the set passes only when every response "
            f"passes. Each run is also compared with the {pct} prediction interval for a single "
            "observation, shown as information only.")


def _number(value: Any, what: str) -> float:
    if isinstance(value, bool):
        raise AnalysisError(f"{what} must be a number, not {value!r}")
    try:
        number = float(value)
    except (TypeError, ValueError):
        raise AnalysisError(f"{what} must be a number, not {value!r}") from None
    if not math.isfinite(number):
        raise AnalysisError(f"{what} must be finite, not {value!r}")
    return number


def _half_ranges(models: dict[str, dict]) -> dict[str, float | None]:
    """Half-range of each factor's declared levels (coded unit), None for a factor given coded."""
    out: dict[str, float | None] = {}
    for model in models.values():
        for f in model["factors"]:
            if f.get("low") is None or f.get("high") is None:
                out.setdefault(f["name"], None)
            else:
                out[f["name"]] = (float(f["high"]) - float(f["low"])) / 2.0
    return out


def _beyond(distance: float, limit: float, *values: float) -> bool:
    """distance > limit, with room for decimal rounding: 1.12 − 1.10 is 0.020000000000000018
    in binary floating point, and a setting typed at the edge of its tolerance is within it."""
    return distance > limit + 1e-9 * max(1.0, *(abs(v) for v in values))


def _fmt(value: float) -> str:
    return f"{value:.6g}"


def _recorded_factors(runs: list[dict], factors: list[str]) -> list[str]:
    """Factors every run records; a factor only some runs record is an error naming the row."""
    recorded = []
    for factor in factors:
        present = [(run["row"], (run.get("settings") or {}).get(factor)) for run in runs]
        have = [row for row, v in present if v is not None]
        if not have:
            continue
        lacking = [row for row, v in present if v is None]
        if lacking:
            raise AnalysisError(f"Row {lacking[0]}: no value for factor '{factor}', which other "
                                "runs record; record it for every run or for none")
        recorded.append(factor)
    return recorded


def _level(run: dict, factor: str, released: str) -> str:
    """The level a run of a categorical factor was made at; another level than the released
    one is refused naming the row."""
    value = str(run["settings"][factor]).strip()
    if value != released:
        raise ConfirmationRefused(
            f"Row {run['row']}: '{factor}' was run at level '{value}', the released level is "
            f"'{released}'; these runs do not confirm the released setpoints", factor=factor)
    return value


def _settings_run(runs: list[dict], released: dict[str, float], recorded: list[str],
                  tolerance: dict[str, float], half: dict[str, float | None]) -> dict[str, Any]:
    """Settings judged at, per-factor deviations, and the refusals the tolerance demands."""
    per_run = {f: [_level(run, f, released[f]) if isinstance(released[f], str) else
                   _number(run["settings"][f], f"Row {run['row']}, factor '{f}'") for run in runs]
               for f in recorded}
    settings, deviations = {}, {}
    for factor, released_value in released.items():
        if isinstance(released_value, str):
            # a categorical factor: the runs are made at the released level (checked by _level)
            settings[factor] = released_value
            deviations[factor] = {"released": released_value, "run": released_value,
                                  "run_low": None, "run_high": None,
                                  "source": "file" if factor in per_run else "released",
                                  "deviation": None, "deviation_coded": None,
                                  "tolerance": None}
            continue
        limit = tolerance.get(factor)
        values = per_run.get(factor)
        if values is None:
            settings[factor] = released_value
            deviations[factor] = {"released": released_value, "run": released_value,
                                  "run_low": None, "run_high": None, "source": "released",
                                  "deviation": 0.0, "deviation_coded": 0.0, "tolerance": limit}
            continue
        spread = max(values) - min(values)
        if limit is not None and _beyond(spread, limit, *values):
            low_row = runs[int(np.argmin(values))]["row"]
            high_row = runs[int(np.argmax(values))]["row"]
            raise ConfirmationRefused(
                f"The runs were made at different settings of '{factor}': {_fmt(min(values))} "
                f"(row {low_row}) to {_fmt(max(values))} (row {high_row}), more than the "
                f"tolerance of {_fmt(limit)} set at release; they cannot be judged as one set",
                factor=factor)
        if limit is not None:
            for run, value in zip(runs, values, strict=True):
                if _beyond(abs(value - released_value), limit, value, released_value):
                    raise ConfirmationRefused(
                        f"Row {run['row']}: '{factor}' was run at {_fmt(value)}, the released "
                        f"value is {_fmt(released_value)} and the tolerance set at release is "
                        f"±{_fmt(limit)}; these runs do not confirm the released setpoints",
                        factor=factor)
        # runs at one setting are judged at exactly that setting (a sum of equal floats
        # divided back need not return the same float)
        mean = values[0] if spread == 0 else float(np.mean(values))
        settings[factor] = mean
        deviation = mean - released_value
        unit = half.get(factor)
        deviations[factor] = {
            "released": released_value, "run": mean, "run_low": min(values),
            "run_high": max(values), "source": "file", "deviation": deviation,
            "deviation_coded": deviation if unit is None else deviation / unit,
            "tolerance": limit}
    return {"settings": settings, "deviations": deviations, "per_run": per_run}


def _settings_notes(deviations: dict[str, dict]) -> list[str]:
    from_file = [f for f, d in deviations.items() if d["source"] == "file"]
    assumed = [f for f, d in deviations.items() if d["source"] == "released"]
    notes = []
    if assumed:
        notes.append("The file records no setting for " + ", ".join(assumed)
                      + ": the released value is assumed for "
                      + ("it." if len(assumed) == 1 else "them."))
    varied = [f for f in from_file if deviations[f]["run_low"] != deviations[f]["run_high"]]
    if varied:
        notes.append("The runs were made at different settings of " + ", ".join(varied)
                     + "; they are judged at the mean of the settings run.")
    if from_file and not assumed:
        notes.append("The settings run were read from the file.")
    elif from_file:
        notes.append("The settings run of " + ", ".join(from_file)
                     + " were read from the file.")
    return notes


def _judge_response(response: str, model_doc: dict, runs: list[dict],
                    settings: dict[str, float], level: float) -> dict[str, Any]:
    model = _model_doc(model_doc)
    rows = [run["row"] for run in runs]
    observed = [_number(run["responses"][response], f"Row {run['row']}, response "
                                                     f"'{response}'") for run in runs]
    transform, lam = model.get("transform", "none"), model.get("lambda")
    transforms.check_domain(np.asarray(observed), transform, np.asarray(rows), response)
    z = transforms.forward(np.asarray(observed), transform, lam)
    m = len(observed)
    for_mean = predict(model_doc, settings, level=level, m=m)
    single = predict(model_doc, settings, level=level, m=1)
    z_mean = float(np.mean(z))
    judged_mean = float(transforms.inverse(z_mean, transform, lam))
    out: dict[str, Any] = {
        "rows": rows, "observed": observed, "m": m, "mean": float(np.mean(observed)),
        "transform": transform, "judged_mean": judged_mean, "judged_mean_model_scale": z_mean,
        "predicted": for_mean["predicted"],
        "interval_for_mean": for_mean["pi"],
        "interval_for_mean_model_scale": for_mean["pi_model_scale"],
        "pi": single["pi"], "pi_model_scale": single["pi_model_scale"]}
    low, high = for_mean["pi_model_scale"]
    s_low, s_high = single["pi_model_scale"]
    if low is None or high is None or s_low is None or s_high is None:
        out.update(inside=[False] * m, outside_single_pi_rows=list(rows), verdict="fail",
                   reason="the fit has no prediction interval to check against")
        return out
    inside = [bool(s_low <= v <= s_high) for v in z.tolist()]
    passed = bool(low <= z_mean <= high)
    out.update(inside=inside,
               outside_single_pi_rows=[r for r, ok in zip(rows, inside, strict=True) if not ok],
               verdict="pass" if passed else "fail",
               reason=None if passed else "the mean of the runs lies outside the interval for "
                                          f"the mean of {m} future observations")
    return out


def judge_confirmation(model_docs: dict[str, Any], released: dict[str, float],
                       runs: list[dict[str, Any]], tolerance: dict[str, float] | None = None,
                       level: float = 0.95) -> dict[str, Any]:
    """Judge confirmation runs against the model of each response.

    Parameters
    ----------
    model_docs : {response: fit result, its to_dict() document, or its 'model' part}
    released : {factor: value} the released settings, actual units
    runs : [{"row": int, "settings": {factor: float | None}, "responses": {response: float}}]
        one entry per confirmation run; a response's runs are those giving a value for it
    tolerance : {factor: largest allowed |deviation|, actual units} set at release, or None
    level : confidence level of both intervals

    Returns
    -------
    dict with ``rule`` (the sentence the page prints), ``level``, ``m`` (runs in the set),
    ``settings`` (released), ``settings_run`` (where the intervals were computed),
    ``settings_notes`` (sentences: where the settings came from, whether they were averaged),
    ``deviations`` {factor: released, run, run_low, run_high, source, deviation,
    deviation_coded, tolerance}, ``tolerance``, ``responses`` {response:
    rows, observed, m, mean, judged_mean, interval_for_mean, pi (single observation),
    inside (per run, information), outside_single_pi_rows, verdict, reason}, ``verdict``.

    Raises
    ------
    ConfirmationRefused
        a run's setting deviates from the released value by more than its tolerance, or the
        runs' settings differ from each other by more than it (names the factor).
    AnalysisError
        malformed input: a response without a model or without values, a non-number.
    """
    if not runs:
        raise AnalysisError("Record at least one confirmation run")
    if not 0 < level < 1:
        raise AnalysisError(f"level must lie between 0 and 1, not {level!r}")
    # a categorical factor is released at a level name (predict checks it is one of its levels)
    released = {f: v if isinstance(v, str) else _number(v, f"Released setting of '{f}'")
                for f, v in released.items()}
    tolerance = {f: _number(v, f"Tolerance of '{f}'") for f, v in (tolerance or {}).items()
                 if v is not None}
    negative = [f for f, v in tolerance.items() if v < 0]
    if negative:
        raise AnalysisError(f"Tolerance of '{negative[0]}' must not be negative")
    models = {r: _model_doc(doc) for r, doc in model_docs.items()}
    unknown = sorted({f["name"] for m in models.values() for f in m["factors"]} - set(released))
    if unknown:
        raise AnalysisError(f"The released settings give no value for factor '{unknown[0]}'")
    # Factors in the models' order (the stored settings may have been sorted by name).
    order = list(dict.fromkeys([f["name"] for m in models.values() for f in m["factors"]]
                               + list(released)))
    released = {f: released[f] for f in order}
    half = _half_ranges(models)
    recorded = _recorded_factors(runs, list(released))
    where = _settings_run(runs, released, recorded, tolerance, half)
    responses: dict[str, Any] = {}
    for response, doc in model_docs.items():
        its_runs = [run for run in runs if (run.get("responses") or {}).get(response) is not None]
        if not its_runs:
            raise AnalysisError(f"No confirmation run gives a value of '{response}'")
        at = where["settings"]
        if len(its_runs) < len(runs):
            at = {**at, **{f: float(np.mean([float(run["settings"][f]) for run in its_runs]))
                           for f in recorded if not isinstance(released[f], str)}}
        responses[response] = {**_judge_response(response, doc, its_runs, at, level),
                               "settings": at}
    verdict = "pass" if all(v["verdict"] == "pass" for v in responses.values()) else "fail"
    return {"rule": rule_sentence(level), "level": level, "m": len(runs),
            "settings": released, "settings_run": where["settings"],
            "settings_notes": _settings_notes(where["deviations"]),
            "deviations": where["deviations"], "tolerance": tolerance or None,
            "runs": [{"row": run["row"],
                      "settings": {f: where["per_run"][f][n] for f in recorded}}
                     for n, run in enumerate(runs)],
            "responses": responses, "verdict": verdict}
