"""Behaviour on simulated data: nominal false-alarm rates on clean designs, and each injected
defect caught by the matching check. Seeded; sizes kept modest (see binomial bounds below)."""

import numpy as np
import pytest
from helpers import ccd, frame_from, full_factorial

from app.analysis import Factor, FitSpec, analyse

ABC = (Factor("A"), Factor("B"), Factor("C"))
REPS = 250
# 99.9 % binomial band around 0.05 for 250 replicates: 0.05 ± 3.3 * sqrt(0.05 * 0.95 / 250)
LOW, HIGH = 0.005, 0.096
EXACT_UNDER_H0 = ("run_order_autocorrelation", "pattern_fitted", "pattern_factor:A",
                  "pattern_factor:B", "pattern_factor:C", "covariate:humidity", "covariate:lot",
                  "lack_of_fit")
APPROXIMATE = ("normality", "run_order_randomness", "constant_variance_fitted",
               "constant_variance_factor:A", "constant_variance_factor:B",
               "constant_variance_factor:C", "outliers")


def _rates(design, model, reps, seed, extra_ids=()):
    rng = np.random.default_rng(seed)
    hits: dict[str, int] = {}
    n = len(design)
    for _ in range(reps):
        y = 20 + 2 * design[:, 0] - design[:, 1] + rng.normal(size=n)
        frame = frame_from(design, y, order=rng.permutation(n) + 1, humidity=rng.normal(size=n),
                           lot=rng.choice(["L1", "L2", "L3"], n))
        spec = FitSpec(response="Y", factors=ABC, model=model, run_order="order",
                       covariates=(("humidity", "numeric"), ("lot", "categorical")))
        for c in analyse(frame, spec).checks:
            if c.p_value is not None and c.p_value < 0.05:
                hits[c.id] = hits.get(c.id, 0) + 1
    return {k: v / reps for k, v in hits.items()}


@pytest.mark.slow
def test_clean_ccd_false_alarm_rates_are_nominal():
    rates = _rates(ccd(3, 1.682, 6), "quadratic", REPS, seed=20240601)
    for cid in EXACT_UNDER_H0:
        assert LOW <= rates.get(cid, 0.0) <= HIGH, (cid, rates.get(cid))
    for cid in APPROXIMATE:  # approximate or conservative tests: never liberal
        assert rates.get(cid, 0.0) <= HIGH, (cid, rates.get(cid))


@pytest.mark.slow
def test_clean_factorial_with_centre_points_curvature_rate_is_nominal():
    design = np.vstack([full_factorial(3), full_factorial(3), np.zeros((4, 3))])
    rates = _rates(design, "linear", REPS, seed=77)
    assert LOW <= rates.get("curvature", 0.0) <= HIGH
    assert LOW <= rates.get("lack_of_fit", 0.0) <= HIGH


DESIGN40 = np.vstack([ccd(3, 1.682, 6)] * 2)  # 40 runs


def _flag_share(make_y, check_id, model="quadratic", seeds=20, row=None, by="verdict"):
    """Share of seeds where the check flags: its verdict (after the battery's multiplicity
    adjustment) or, with ``by="p"``, its own p-value below 0.05. ``check_id`` may be a tuple:
    then any of those checks flagging counts."""
    ids = check_id if isinstance(check_id, tuple) else (check_id,)
    flagged = 0
    n = len(DESIGN40)
    for seed in range(seeds):
        rng = np.random.default_rng(1000 + seed)
        order = rng.permutation(n) + 1
        y = make_y(rng, order)
        frame = frame_from(DESIGN40, y, order=order)
        result = analyse(frame, FitSpec(response="Y", factors=ABC, model=model, run_order="order"))
        hit = False
        for cid in ids:
            c = result.check(cid)
            one = (c.verdict in ("review", "fail") if by == "verdict"
                   else c.p_value is not None and c.p_value < 0.05)
            hit = hit or (one and (row is None or row in c.runs))
        flagged += hit
    return flagged / seeds


def _base(rng, n=40):
    x = DESIGN40
    return 30 + 2 * x[:, 0] - 1.5 * x[:, 1] + 0.5 * x[:, 2]


def test_ar1_errors_in_run_order_are_flagged():
    def make(rng, order):
        u = np.zeros(40)
        for t in range(1, 40):
            u[t] = 0.8 * u[t - 1] + rng.normal()
        return _base(rng) + u[order - 1]
    assert _flag_share(make, "run_order_autocorrelation") >= 0.8


def test_spread_growing_with_a_factor_is_flagged():
    def make(rng, order):
        return _base(rng) + rng.normal(size=40) * np.exp(1.2 * DESIGN40[:, 0])
    assert _flag_share(make, "constant_variance_factor:A", by="p") >= 0.8
    # after the adjustment across 14 checks of the fit (seen: 15 of 20)
    assert _flag_share(make, "constant_variance_factor:A") >= 0.7


def test_six_sigma_outlier_is_flagged_at_its_row():
    def make(rng, order):
        y = _base(rng) + rng.normal(size=40)
        y[16] += 6.0  # row 17
        return y
    assert _flag_share(make, "outliers", row=17) >= 0.9


def test_missing_square_term_is_flagged():
    def make(rng, order):
        return _base(rng) - 2.0 * DESIGN40[:, 2] ** 2 + rng.normal(size=40)
    assert _flag_share(make, "pattern_factor:C", model="interaction") >= 0.9
    assert _flag_share(make, "lack_of_fit", model="interaction") >= 0.9


def test_drift_over_run_order_is_flagged():
    def make(rng, order):
        return _base(rng) + 0.12 * order + 0.7 * rng.normal(size=40)
    assert _flag_share(make, "run_order_randomness", by="p") >= 0.8
    # the approver sees the drift through the run-order checks together (seen: 19 of 20)
    assert _flag_share(make, ("run_order_randomness", "run_order_autocorrelation")) >= 0.9
