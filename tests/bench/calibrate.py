"""What a pass is worth: false-alarm and detection rates of the residual checks (make calibrate).

For three designs people run (a 20-run rotatable central composite and a 15-run Box–Behnken,
both with the quadratic model; a 2^4 factorial with 4 centre points and the interaction model)
it simulates fits in random run order: clean data (the model right, iid normal errors) and five
defects, and counts how often each check's verdict is review or fail (after the battery's
multiplicity adjustment). Prints a Markdown table per design and writes
app/data/calibration.json, which the review page shows beside a fit of the same design.

Defects, each against unit error SD:
  ar1      AR(1) errors in run order, rho = 0.6
  drift    a linear drift of 3 SD from the first run to the last
  spread   the error SD doubled at the high level of factor A (A > 0)
  outlier  one run, chosen at random, shifted by 4 SD
  square   a square term the model leaves out: 2·A² (the CCD and Box–Behnken fits drop A^2;
           the interaction model of the factorial has no squares)

Run: python tests/bench/calibrate.py [--reps N]   (not a test; seeded, reproducible)
"""

from __future__ import annotations

import argparse
import json
import sys
from itertools import product
from multiprocessing import Pool

import numpy as np
import pandas as pd

from app import PACKAGE
from app.analysis import Factor, FitSpec, analyse
from app.analysis.calibration import DRAWS

OUT = PACKAGE / "data" / "calibration.json"
SCENARIOS = ("clean", "ar1", "drift", "spread", "outlier", "square")


def _cube(k: int) -> np.ndarray:
    return np.array(list(product([-1.0, 1.0], repeat=k)))


def _ccd20() -> np.ndarray:
    a = 8 ** 0.25  # rotatable for a 2^3 cube
    return np.vstack([_cube(3), np.eye(3) * a, -np.eye(3) * a, np.zeros((6, 3))])


def _bbd15() -> np.ndarray:
    rows = []
    for i, j in ((0, 1), (0, 2), (1, 2)):
        for a, b in product([-1.0, 1.0], repeat=2):
            r = [0.0, 0.0, 0.0]
            r[i], r[j] = a, b
            rows.append(r)
    return np.vstack([np.array(rows), np.zeros((3, 3))])


def _fact16cp4() -> np.ndarray:
    return np.vstack([_cube(4), np.zeros((4, 4))])


QUADRATIC_NO_A2 = ("A", "B", "C", "A:B", "A:C", "B:C", "B^2", "C^2")
DESIGNS = {
    "ccd20_quadratic": {
        "title": "central composite, 3 factors, 20 runs (6 centre), rotatable; quadratic model",
        "kind": "central_composite", "n_runs": 20, "n_factors": 3, "model": "quadratic",
        "coded": _ccd20, "square_terms": QUADRATIC_NO_A2},
    "bbd15_quadratic": {
        "title": "Box-Behnken, 3 factors, 15 runs (3 centre); quadratic model",
        "kind": "box_behnken", "n_runs": 15, "n_factors": 3, "model": "quadratic",
        "coded": _bbd15, "square_terms": QUADRATIC_NO_A2},
    "fact16cp4_interaction": {
        "title": "2^4 full factorial with 4 centre points, 20 runs; interaction model",
        "kind": "two_level_full_factorial", "n_runs": 20, "n_factors": 4,
        "model": "interaction", "coded": _fact16cp4, "square_terms": None},
}


def _errors(scenario: str, coded: np.ndarray, order: np.ndarray, rng) -> np.ndarray:
    """Errors for each run (in table order); ``order`` is each run's position in time (0-based)."""
    n = len(coded)
    z = rng.standard_normal(n)
    if scenario == "ar1":
        u = np.empty(n)
        u[0] = z[0] / np.sqrt(1 - 0.36)  # stationary start
        for t in range(1, n):
            u[t] = 0.6 * u[t - 1] + z[t]
        return u[order]
    if scenario == "drift":
        return z + 3.0 * (order / (n - 1) - 0.5)
    if scenario == "spread":
        return z * np.where(coded[:, 0] > 1e-9, 2.0, 1.0)
    if scenario == "outlier":
        z[rng.integers(n)] += 4.0
        return z
    if scenario == "square":
        return z + 2.0 * coded[:, 0] ** 2
    return z


def _one(args) -> dict:
    key, scenario, rep = args
    d = DESIGNS[key]
    coded = d["coded"]()
    n, k = coded.shape
    names = "ABCD"[:k]
    rng = np.random.default_rng([SCENARIOS.index(scenario), rep, n, k])
    order = rng.permutation(n)
    y = 50 + coded @ np.linspace(3, 1, k) + _errors(scenario, coded, order, rng)
    frame = pd.DataFrame({names[j]: coded[:, j] for j in range(k)} | {"Y": y, "order": order + 1},
                         index=pd.RangeIndex(1, n + 1))
    terms = d["square_terms"] if scenario == "square" else None
    spec = FitSpec(response="Y", factors=tuple(Factor(c) for c in names), run_order="order",
                   model=d["model"], terms=terms)
    result = analyse(frame, spec)
    return {c.id: c.verdict for c in result.checks}


def calibrate(reps: int, pool: Pool) -> dict:
    table = {}
    for key in DESIGNS:
        rows: dict[str, dict] = {}
        summary = {}
        for scenario in SCENARIOS:
            verdicts = pool.map(_one, [(key, scenario, r) for r in range(reps)], chunksize=8)
            ids = list(verdicts[0])
            for cid in ids:
                flagged = sum(v[cid] in ("review", "fail") for v in verdicts) / reps
                na = sum(v[cid] == "not_applicable" for v in verdicts) / reps
                row = rows.setdefault(cid, {"flagged": {}, "not_applicable": {}})
                row["flagged"][scenario] = round(flagged, 3)
                row["not_applicable"][scenario] = round(na, 3)
            if scenario == "clean":
                summary = {
                    "any_review_or_fail": round(sum(any(x in ("review", "fail") for x in v.values())
                                                    for v in verdicts) / reps, 3),
                    "any_fail": round(sum(any(x == "fail" for x in v.values())
                                          for v in verdicts) / reps, 3)}
            summary[f"any_flag_{scenario}"] = round(
                sum(any(x in ("review", "fail") for x in v.values()) for v in verdicts) / reps, 3)
        d = DESIGNS[key]
        table[key] = {"title": d["title"], "kind": d["kind"], "n_runs": d["n_runs"],
                      "n_factors": d["n_factors"], "model": d["model"], "reps": reps,
                      "summary": summary, "checks": rows}
    return table


def _cell(flagged: float, not_applicable: float) -> str:
    if not_applicable == 1.0:
        return "—"
    return f"{flagged:.0%}" + (f" (n/a {not_applicable:.0%})" if not_applicable else "")


def markdown(table: dict) -> str:
    lines = []
    for entry in table.values():
        s = entry["summary"]
        lines += ["", f"### {entry['title']}", "",
                  f"{entry['reps']} simulated fits per column. Clean data: any review or fail "
                  f"{s['any_review_or_fail']:.1%}, any fail {s['any_fail']:.1%}. Cells: share of "
                  "fits where the check says review or fail; in brackets the share where it says "
                  "not applicable (the design cannot use it); — means never applicable.", "",
                  "| check | " + " | ".join(SCENARIOS) + " |",
                  "|---|" + "---|" * len(SCENARIOS)]
        for cid, rates in entry["checks"].items():
            cells = [_cell(rates["flagged"][sc], rates["not_applicable"][sc]) for sc in SCENARIOS]
            lines.append(f"| {cid} | " + " | ".join(cells) + " |")
        lines.append("| **any check** | " + " | ".join(
            f"{s['any_flag_' + sc]:.0%}" for sc in SCENARIOS) + " |")
    return "\n".join(lines)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--reps", type=int, default=400)
    parser.add_argument("--no-write", action="store_true", help="print only")
    args = parser.parse_args()
    with Pool(2) as pool:
        table = calibrate(args.reps, pool)
    doc = {"draws_per_fit": DRAWS, "scenarios": list(SCENARIOS), "designs": table,
           "made_by": "tests/bench/calibrate.py"}
    print(markdown(table))
    if not args.no_write:
        OUT.write_text(json.dumps(doc, indent=1) + "\n")  # checks in battery order
        print(f"\nwritten: {OUT}", file=sys.stderr)


if __name__ == "__main__":
    main()
