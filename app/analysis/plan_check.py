"""Runs made against runs planned: which planned run each row is, and where the settings run
differ from the planned ones by more than a tolerance.

Rows are matched by run label when both the plan and the table have labels, else by run order,
else by position. Each factor's tolerance is in natural units (default: ``DEFAULT_FRACTION`` of
the factor's planned range). Pure: a plan document (app.analysis.plans.build_plan) and a pandas
frame in, a JSON-able report out.
"""

from __future__ import annotations

import math
from typing import Any

import pandas as pd

DEFAULT_FRACTION = 0.01  # of the factor's range (high - low): the default tolerance


class PlanMismatch(ValueError):
    """The table cannot be compared with the plan at all (a planned factor is missing)."""

    def __init__(self, message: str, field: str | None = None) -> None:
        super().__init__(message)
        self.field = field


def tolerances(plan: dict, given: dict[str, Any] | None = None) -> dict[str, float]:
    """Each factor's tolerance in natural units: ``given`` where set, else 1 % of its range."""
    given = dict(given or {})
    names = [f["name"] for f in plan["factors"]]
    unknown = [k for k in given if k not in names]
    if unknown:
        raise PlanMismatch(f"Tolerance for '{unknown[0]}': not a factor of the plan.",
                           field=f"tolerance.{unknown[0]}")
    out = {}
    for f in plan["factors"]:
        if f.get("levels") is not None:  # a level name must match exactly
            continue
        value = given.get(f["name"])
        if value is None:
            out[f["name"]] = DEFAULT_FRACTION * (float(f["high"]) - float(f["low"]))
            continue
        try:
            number = float(value)
        except (TypeError, ValueError):
            number = math.nan
        if not math.isfinite(number) or number < 0:
            raise PlanMismatch(f"Tolerance for '{f['name']}' must be a number of at least 0 "
                               f"(got {value!r}).", field=f"tolerance.{f['name']}")
        out[f["name"]] = number
    return out


def compare(plan: dict, frame: pd.DataFrame, *, label: str | None, run_order: str | None,
            tolerance: dict[str, float]) -> dict[str, Any]:
    """Deviations, missing planned runs and unplanned extra runs."""
    planned = plan["runs"]
    names = [f["name"] for f in plan["factors"]]
    missing_columns = [n for n in names if n not in frame.columns]
    if missing_columns:
        raise PlanMismatch(f"The table has no column for the planned factor "
                           f"'{missing_columns[0]}'.", field=missing_columns[0])
    if label is not None:
        key, how = "label", "run label"
        keys = [str(v) for v in frame[label].tolist()]
        wanted = {str(r["label"]): r for r in planned}
    elif run_order is not None:
        key, how = "run_order", "run order"
        keys = [int(v) for v in frame[run_order].tolist()]
        wanted = {int(r["run_order"]): r for r in planned}
    else:
        key, how = "run_order", "position (no run label or run order column)"
        keys = list(range(1, len(frame) + 1))
        wanted = {int(r["run_order"]): r for r in planned}
    deviations, extra, seen = [], [], set()
    for row, match_key, (_, values) in zip(frame.index.tolist(), keys, frame.iterrows(),
                                           strict=True):
        run = wanted.get(match_key)
        if run is None or match_key in seen:
            extra.append({"row": int(row), key: match_key})
            continue
        seen.add(match_key)
        for name in names:
            done, meant = values[name], run["settings"][name]
            if isinstance(meant, str) or isinstance(done, str):
                if str(done) != str(meant):
                    deviations.append({"row": int(row), "label": run["label"],
                                       "run_order": run["run_order"], "factor": name,
                                       "planned": meant, "run": done, "difference": None})
                continue
            gap = float(done) - float(meant)
            if abs(gap) > tolerance[name] + 1e-12 * max(1.0, abs(float(meant))):
                deviations.append({"row": int(row), "label": run["label"],
                                   "run_order": run["run_order"], "factor": name,
                                   "planned": float(meant), "run": float(done),
                                   "difference": gap, "tolerance": tolerance[name]})
    missing = [{"label": r["label"], "run_order": r["run_order"]}
               for k, r in wanted.items() if k not in seen]
    return {"matched_by": how, "tolerance": tolerance, "planned_runs": len(planned),
            "matched_runs": len(seen), "deviations": deviations, "missing": missing,
            "extra": extra}
