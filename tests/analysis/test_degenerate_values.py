"""Degenerate values fail closed: a missing p-value never passes, and a residual SD of zero
gives no SE, t or p (None in the document, shown as —) instead of rounding residue.

References: the definitions only. A p-value that is not a number carries no evidence; with a
residual SD of zero, SE = s sqrt((X'X)^-1_jj) is zero and t = b / SE undefined, so any number
shown comes from rounding (statsmodels OLS, run on the fits below, reports SE about 1e-15 and
p-values from 1e-253 to 0.55: rounding residue, not evidence).
"""

import json
import math

import numpy as np
import pytest
from helpers import ccd, frame_from

from app.analysis import Factor, FitSpec, Thresholds, analyse
from app.analysis.spec import NO_P_VALUE_REASON

ABC = (Factor("A"), Factor("B"), Factor("C"))


@pytest.mark.parametrize("p_value", [float("nan"), None, float("inf"), -0.1, 1.5])
def test_verdict_without_a_p_value_is_not_applicable(p_value):
    # before the fix Thresholds().verdict(nan) returned "pass"
    thresholds = Thresholds()
    assert thresholds.verdict(p_value) == "not_applicable"
    judgement = thresholds.judge(p_value)
    assert judgement.verdict == "not_applicable" and judgement.reason == NO_P_VALUE_REASON


@pytest.mark.parametrize(("p_value", "verdict"), [(0.5, "pass"), (1.0, "pass"), (0.05, "pass"),
                                                  (0.03, "review"), (0.001, "fail"), (0.0, "fail")])
def test_verdict_of_a_p_value(p_value, verdict):
    assert Thresholds().verdict(p_value) == verdict
    assert Thresholds().judge(p_value).reason is None


def _zero_sd_documents():
    x = ccd(3, 1.682, 6)
    constant = frame_from(x, np.full(20, 50.0))
    perfect = frame_from(x, 10 + 2 * x[:, 0] - x[:, 1] + 0.5 * x[:, 0] * x[:, 1])
    return [analyse(constant, FitSpec(response="Y", factors=ABC)),
            analyse(perfect, FitSpec(response="Y", factors=ABC, model="interaction"))]


@pytest.mark.parametrize("index", [0, 1], ids=["constant response", "perfect fit"])
def test_zero_residual_sd_gives_no_se_t_or_p(index):
    # Before the fix the constant response showed every p as 0.0, and the perfect fit SE 8.9e-16
    # with p 1e-64.
    result = _zero_sd_documents()[index]
    doc = json.loads(json.dumps(result.to_dict()))
    for row in doc["coefficients"]:
        assert row["std_error"] is None and row["t_value"] is None and row["p_value"] is None
        assert row["ci"] == [None, None]
        assert row["estimate"] is not None
    for row in doc["anova"]:
        assert row["p_value"] is None and row["f_value"] is None, row["source"]
    for c in result.coefficients:
        assert math.isnan(c.p_value) and math.isnan(c.std_error)
