"""Durbin–Watson exact p-value (Imhof) against published bound tables and simulation.

Sources (tests/data/reference, see its README): the Savin & White (1977) 1 % table as
copied into a public test-data file, and their 5 % table recalled from memory;
durbin_watson_examples.json (R lmtest data); statsmodels' durbin_watson statistic; a seeded
Monte Carlo of the null distribution.
"""

import numpy as np
import pytest
from helpers import REFERENCE, load_json
from numpy.testing import assert_allclose
from scipy import optimize
from statsmodels.stats.stattools import durbin_watson as sm_durbin_watson

from app.analysis.durbin_watson import (
    beta_approx_p_positive,
    durbin_watson_test,
    exact_p_positive,
    imhof_cdf_at_zero,
    residual_space_eigenvalues,
)


def _savin_white(name, skip=()):
    """{(n, k'): (dL, dU)} from a table laid out as printed: n, then dL dU for k' = 1..5."""
    out = {}
    for line in (REFERENCE / name).read_text().splitlines():
        parts = line.split()
        if len(parts) == 11 and parts[0].isdigit():
            n = int(parts[0])
            for k in range(1, 6):
                dl, du = float(parts[2 * k - 1]), float(parts[2 * k])
                if dl > 0 and (n, k) not in skip:
                    out[(n, k)] = (dl, du)
    return out


# n=40, k'=5 is a known misprint of the copied 1 % table
TABLE1 = _savin_white("durbin_watson_bounds_1pct_savin_white.txt", skip={(40, 5)})
# Savin & White (1977) 5 % table, recalled from memory (see the file's header)
TABLE5 = _savin_white("durbin_watson_bounds_5pct_savin_white.txt")


def _bound_nu(n):
    j = np.arange(1, n)
    return 2 * (1 - np.cos(np.pi * j / n))


def _random_q(n, k, seed):
    rng = np.random.default_rng(seed)
    x = np.column_stack([np.ones(n), rng.normal(size=(n, k))])
    q, _ = np.linalg.qr(x)
    return q


def _imhof_bounds(n, k, *, alpha):
    """dL, dU: the alpha points of the Durbin & Watson (1950) bounding laws by Imhof inversion."""
    nu = _bound_nu(n)
    lower = optimize.brentq(lambda d: imhof_cdf_at_zero(nu[: n - k - 1] - d) - alpha, 0.01, 3.99)
    upper = optimize.brentq(lambda d: imhof_cdf_at_zero(nu[k:] - d) - alpha, 0.01, 3.99)
    return lower, upper


def test_savin_white_table_has_expected_extent():
    assert len(TABLE1) > 200 and (200, 5) in TABLE1


@pytest.mark.parametrize("key", sorted(TABLE1)[::6])
def test_imhof_on_bounding_distributions_reproduces_savin_white_1pct(key):
    # source: Savin & White (1977) 1 % table (printed to 3 decimals); the lower bound law uses
    # nu_1..nu_{n-k'-1} and the upper nu_{k'+1}..nu_{n-1} (Durbin & Watson 1950)
    assert_allclose(_imhof_bounds(*key, alpha=0.01), TABLE1[key], atol=1.5e-3)


def test_savin_white_5pct_table_has_expected_extent():
    assert len(TABLE5) == 35 and (100, 5) in TABLE5


@pytest.mark.parametrize("key", sorted(TABLE5))
def test_imhof_on_bounding_distributions_reproduces_savin_white_5pct(key):
    # source: Savin & White (1977) 5 % table, 3 decimals, recalled from memory
    assert_allclose(_imhof_bounds(*key, alpha=0.05), TABLE5[key], atol=1.5e-3)


@pytest.mark.parametrize("key", sorted(TABLE5))
def test_exact_p_is_bracketed_by_5pct_bounds_for_random_designs(key):
    # source: Savin & White (1977) 5 % table (from memory, 3 decimals; slack for that rounding):
    # for any X with intercept and k' regressors, P(D <= dL) <= 0.05 <= P(D <= dU)
    n, k = key
    dl, du = TABLE5[key]
    for seed in range(3):
        nu = residual_space_eigenvalues(_random_q(n, k, 100 * n + 10 * k + seed))
        assert exact_p_positive(dl, nu) <= 0.05 + 1e-3
        assert exact_p_positive(du, nu) >= 0.05 - 1e-3


@pytest.mark.parametrize(
    "key", [(n, k) for (n, k) in sorted(TABLE1) if n in (10, 20, 35, 60, 100, 200)])
def test_exact_p_is_bracketed_by_1pct_bounds_for_random_designs(key):
    # source: Savin & White (1977) 1 % table, 3 decimals (slack for that rounding)
    n, k = key
    dl, du = TABLE1[key]
    for seed in range(2):
        nu = residual_space_eigenvalues(_random_q(n, k, 7 * n + k + seed))
        assert exact_p_positive(dl, nu) <= 0.01 + 5e-4
        assert exact_p_positive(du, nu) >= 0.01 - 5e-4


@pytest.mark.parametrize("key", [(15, 1), (20, 3), (30, 5)])
def test_bounding_distribution_5pct_points_by_monte_carlo(key):
    # source: Savin & White (1977) 5 % table (from memory) against a seeded Monte Carlo of the
    # Durbin & Watson (1950) bounding laws, d = sum(nu_j z_j^2) / sum(z_j^2): independent of
    # Imhof's inversion. 200 000 draws: binomial SE of the 5 % point's probability < 0.0005.
    n, k = key
    dl, du = TABLE5[key]
    nu = _bound_nu(n)
    z2 = np.random.default_rng(1977 + n + k).normal(size=(200_000, n - k - 1)) ** 2
    lower = z2 @ nu[: n - k - 1] / z2.sum(axis=1)
    upper = z2 @ nu[k:] / z2.sum(axis=1)
    assert_allclose(np.mean(lower <= dl), 0.05, atol=0.003)
    assert_allclose(np.mean(upper <= du), 0.05, atol=0.003)


@pytest.mark.parametrize("name", ["growthofmoney", "bondyield"])
def test_lmtest_examples_statistic_and_monte_carlo_p(name):
    # source: durbin_watson_examples.json (R lmtest data); statistic vs statsmodels, exact p vs
    # a seeded Monte Carlo of e = M z (40 000 draws, binomial SE < 0.0025)
    d = load_json("durbin_watson_examples.json")[name]
    y = np.array(d["y"])
    xs = np.array(d["X"]) if "X" in d else np.array(d["x"])[:, None]
    x = np.column_stack([np.ones(len(y)), xs])
    q, _ = np.linalg.qr(x)
    e = y - q @ (q.T @ y)
    res = durbin_watson_test(e, q)
    assert_allclose(res.statistic, sm_durbin_watson(e), rtol=1e-12)
    rng = np.random.default_rng(2024)
    z = rng.normal(size=(40_000, len(y)))
    ez = z - (z @ q) @ q.T
    dz = np.sum(np.diff(ez, axis=1) ** 2, axis=1) / np.sum(ez**2, axis=1)
    assert_allclose(res.pvalue, np.mean(dz <= res.statistic), atol=0.01)
    assert_allclose(res.extras["p_two_sided"], 2 * min(res.pvalue, 1 - res.pvalue), rtol=1e-12)


def test_beta_approximation_tracks_exact_value():
    # documented approximation above n = 2000, compared with the exact value at n = 400
    q = _random_q(400, 5, 9)
    nu = residual_space_eigenvalues(q)
    for d in (1.7, 1.8, 1.9, 2.0, 2.2):
        assert_allclose(beta_approx_p_positive(d, q), exact_p_positive(d, nu), atol=0.005)


def test_large_n_uses_the_approximation_and_flags_ar1():
    rng = np.random.default_rng(5)
    n = 2500
    x = np.column_stack([np.ones(n), rng.normal(size=(n, 2))])
    q, _ = np.linalg.qr(x)
    u = np.zeros(n)
    for t in range(1, n):
        u[t] = 0.3 * u[t - 1] + rng.normal()
    e = u - q @ (q.T @ u)
    res = durbin_watson_test(e, q)
    assert res.method.startswith("beta approximation")
    assert res.pvalue < 1e-6
