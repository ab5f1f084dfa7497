"""Benchmark of the analysis engine (run: python tests/bench/bench_analysis.py; not a test).

1. A 20-run three-factor CCD, full check, against a baseline making the equivalent statsmodels
   calls (OLS, OLSInfluence, Anderson-Darling, Durbin-Watson statistic, Ljung-Box, runs test,
   Breusch-Pagan, Levene/Bartlett per factor, ANOVA via anova_lm) in the same run: ratio; and
   the same battery without the draws simulated for the design (textbook p-values), which
   the baseline has no counterpart for.
2. 100k runs x 5 factors, quadratic model: full check time, and t(100k) / t(10k).
"""

from __future__ import annotations

import sys
import time
from itertools import product
from pathlib import Path

import numpy as np
import pandas as pd

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

from app.analysis import Factor, FitSpec, analyse, engine  # noqa: E402


def ccd_frame(seed: int = 0) -> pd.DataFrame:
    a = 1.682
    cube = np.array(list(product([-1.0, 1.0], repeat=3)))
    x = np.vstack([cube, np.eye(3) * a, -np.eye(3) * a, np.zeros((6, 3))])
    rng = np.random.default_rng(seed)
    y = 50 + 3 * x[:, 0] - 2 * x[:, 1] + x[:, 0] * x[:, 1] - 2 * x[:, 2] ** 2 + rng.normal(size=20)
    return pd.DataFrame({"A": x[:, 0], "B": x[:, 1], "C": x[:, 2], "Y": y,
                         "order": rng.permutation(20) + 1}, index=pd.RangeIndex(1, 21))


def baseline(frame: pd.DataFrame) -> None:
    """The equivalent checks with statsmodels/scipy calls (DW without an exact p-value)."""
    import statsmodels.api as sm
    from scipy import stats
    from statsmodels.sandbox.stats.runs import runstest_1samp
    from statsmodels.stats.diagnostic import acorr_ljungbox, het_breuschpagan, normal_ad
    from statsmodels.stats.outliers_influence import OLSInfluence
    from statsmodels.stats.stattools import durbin_watson

    x = frame[["A", "B", "C"]].to_numpy()
    cols = [np.ones(len(x))] + [x[:, j] for j in range(3)]
    cols += [x[:, i] * x[:, j] for i in range(3) for j in range(i + 1, 3)]
    cols += [x[:, j] ** 2 for j in range(3)]
    xm = np.column_stack(cols)
    y = frame["Y"].to_numpy()
    fit = sm.OLS(y, xm).fit()
    infl = OLSInfluence(fit)
    _ = (infl.resid_studentized_internal, infl.resid_studentized_external, infl.cooks_distance,
         infl.dffits, infl.hat_matrix_diag)
    e = fit.resid[np.argsort(frame["order"].to_numpy())]
    normal_ad(fit.resid)
    durbin_watson(e)
    acorr_ljungbox(e, lags=[4])
    runstest_1samp(e, cutoff="median", correction=False)
    het_breuschpagan(fit.resid, np.column_stack([np.ones(len(y)), fit.fittedvalues]))
    for j in range(3):
        levels = np.unique(x[:, j])
        groups = [fit.resid[x[:, j] == v] for v in levels if np.sum(x[:, j] == v) > 1]
        stats.levene(*groups, center="median")
        stats.bartlett(*groups)
    fit.f_test(np.eye(10)[1:])
    for j in range(1, 10):
        fit.t_test(np.eye(10)[j])


def best_of(fn, repeats: int) -> float:
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return min(times)


def big_frame(n: int, seed: int = 1) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    levels = np.array([-2.0, -1.0, 0.0, 1.0, 2.0])
    x = levels[rng.integers(0, 5, size=(n, 5))]
    y = 10 + x @ [1.0, -0.5, 0.3, 0.0, 0.2] + 0.3 * x[:, 0] ** 2 + rng.normal(size=n)
    data = {f"X{j + 1}": x[:, j] for j in range(5)}
    data["Y"] = y + 20
    data["order"] = rng.permutation(n) + 1
    return pd.DataFrame(data, index=pd.RangeIndex(1, n + 1))


def main() -> None:
    frame = ccd_frame()
    spec = FitSpec(response="Y", factors=(Factor("A"), Factor("B"), Factor("C")),
                   run_order="order", model="quadratic")
    analyse(frame, spec)
    baseline(frame)
    t_ours = best_of(lambda: analyse(frame, spec), 20)
    t_base = best_of(lambda: baseline(frame), 20)
    # The same battery with the textbook p-values only: no draws simulated for the design.
    simulate, engine._null_draws = engine._null_draws, lambda *args: None
    try:
        t_plain = best_of(lambda: analyse(frame, spec), 20)
    finally:
        engine._null_draws = simulate
    print(f"20-run CCD full check: plumbline {t_ours * 1e3:.1f} ms, statsmodels baseline "
          f"{t_base * 1e3:.1f} ms, ratio {t_ours / t_base:.2f} (target <= 1.0, set for the "
          "first engine, before p-values and detection rates were simulated for the design)")
    print(f"  the same checks with textbook p-values only: {t_plain * 1e3:.1f} ms, ratio "
          f"{t_plain / t_base:.2f}; the simulated draws take the other "
          f"{(t_ours - t_plain) * 1e3:.1f} ms")
    spec5 = FitSpec(response="Y", factors=tuple(Factor(f"X{j + 1}") for j in range(5)),
                    run_order="order", model="quadratic")
    timings = {}
    for n in (10_000, 100_000):
        big = big_frame(n)
        analyse(big, spec5)
        timings[n] = best_of(lambda big=big: analyse(big, spec5), 3)
        result = analyse(big, spec5)
        t0 = time.perf_counter()
        result.to_dict()
        t_doc = time.perf_counter() - t0
        print(f"{n:>7} runs x 5 factors, quadratic: full check {timings[n]:.3f} s "
              f"(to_dict of the result: {t_doc:.3f} s more); DW method: "
              f"{result.check('run_order_autocorrelation').details['dw_method']}")
    print(f"100k full check {timings[100_000]:.3f} s (target <= 2 s); "
          f"t(100k)/t(10k) = {timings[100_000] / timings[10_000]:.2f} (target <= 15)")


if __name__ == "__main__":
    main()
