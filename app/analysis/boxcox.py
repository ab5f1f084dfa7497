"""Box–Cox profile likelihood for the model's own X: lambda-hat, 95 % CI and a suggestion.

Box & Cox (1964), J. R. Statist. Soc. B 26: with the geometric-mean-scaled transform
z(lambda) = (y^lambda - 1) / (lambda g^(lambda - 1)) (g the geometric mean of y; g log y at
lambda = 0) the profile log-likelihood is L(lambda) = -n/2 log(RSS(lambda) / n), RSS from
regressing z on X; it equals the unscaled form -n/2 log(RSS/n) + (lambda - 1) sum log y.

Numerics. The model has an intercept, so z may be shifted by any constant: we use
z = g expm1(lambda log(y/g)) / lambda, which is near y - g for every lambda instead of carrying a
constant that dwarfs the variation (y near 100 at lambda = -3, or 1e6 + y). Residuals come
directly from the fit's QR, r = z - Q(Q'z) with one refinement step, never from ||z||² - ||Q'z||²
(which cancels catastrophically when the response's relative spread is small). So L is the same
up to a constant for y and c·y: lambda-hat and the CI are unit invariant (not shift invariant).

The CI is {lambda : L >= L(lambda-hat) - chi2(0.95; 1)/2} within the range searched. Verified on
the poisons data (lambda-hat near -0.75 for the additive model, Box & Cox, recalled from memory),
against scipy.stats.boxcox_llf and against statsmodels OLS per lambda in
tests/analysis/test_boxcox_numerics.py.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import optimize, special

LAMBDA_RANGE = (-3.0, 3.0)
GRID_SIZE = 31
CHI2_95_1DF = float(special.chdtri(1, 0.05))  # chi-square 95 % point, 1 df
# A residual RMS below this fraction of the transformed response's RMS spread is rounding:
# the model then fits that transform exactly and the likelihood has no maximum.
EXACT_FIT_RTOL = 1e-11
# Candidates the suggestion may name, with the transform each stands for.
CANDIDATES = ((1.0, "none"), (0.5, "sqrt"), (0.0, "log"), (-1.0, "inverse"))
RANGE_TEXT = f"[{LAMBDA_RANGE[0]:g}, {LAMBDA_RANGE[1]:g}]"


@dataclass(frozen=True)
class BoxCoxResult:
    """The profile and what it supports. Every field is present whether or not lambda could be
    estimated: then ``lambda_hat`` is None and ``reason`` says why.

    ``ci_open`` says, for the low and high end, that the interval runs to the edge of the range
    searched (it may extend beyond). ``at_edge`` means the likelihood is highest at an edge of the
    range, so there is no estimate inside it; ``ci`` is then the supported part of the range.
    """

    lambda_hat: float | None
    ci: tuple[float, float] | None
    ci_open: tuple[bool, bool]
    at_edge: bool
    suggestion: str | None
    profile: tuple[tuple[float, float], ...]
    message: str
    reason: str | None

    def to_dict(self) -> dict:
        return {"lambda_hat": self.lambda_hat,
                "ci": None if self.ci is None else list(self.ci),
                "ci_open": list(self.ci_open), "at_edge": self.at_edge,
                "lambda_range": list(LAMBDA_RANGE), "suggestion": self.suggestion,
                "profile": [{"lambda": lam, "log_likelihood": ll} for lam, ll in self.profile],
                "message": self.message, "reason": self.reason}


def not_estimated(reason: str) -> BoxCoxResult:
    """A result that carries only the reason lambda could not be estimated."""
    return BoxCoxResult(None, None, (False, False), False, None, (),
                        f"lambda not estimated: {reason}.", reason)


def _rss_css(z: np.ndarray, q: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(RSS, centred SS) of each column of ``z`` (or of the vector ``z``) for the column space of
    the orthonormal ``q``, which holds the intercept.

    One pass over ``q`` (most of the cost at 100,000 runs): RSS = SS - |q'z|^2 on the centred
    column, which is exact to about 1e-12 relative while RSS is not tiny next to SS. Where it is
    (a near-exact fit), the residual is formed explicitly with one refinement step instead.
    """
    zc = z - z.mean(axis=0)
    css = np.einsum("i...,i...->...", zc, zc)
    c = q.T @ zc
    rss = css - np.einsum("i...,i...->...", c, c)
    near_exact = rss <= 1e-4 * css
    if np.any(near_exact):
        r = zc - q @ c
        r = r - q @ (q.T @ r)  # one refinement step
        rss = np.where(near_exact, np.einsum("i...,i...->...", r, r), rss)
    return rss, css


class _Profile:
    """L(lambda) for the column space spanned by the orthonormal ``q`` (which holds the mean)."""

    def __init__(self, y: np.ndarray, q: np.ndarray):
        log_y = np.log(y)
        self.g = float(np.exp(np.mean(log_y)))
        # log(y/g) without cancellation when y - g is small next to g
        self.d = np.log1p((y - self.g) / self.g)
        self.q = np.asfortranarray(q)  # q'z reads it column by column
        self.n = len(y)
        self.exact_at: float | None = None

    def transformed(self, lam: float) -> np.ndarray:
        if abs(lam) < 1e-12:
            return self.g * self.d
        return self.g * np.expm1(lam * self.d) / lam

    def rss(self, lam: float) -> tuple[float, float]:
        """(RSS, centred SS) of the transformed response."""
        rss, css = _rss_css(self.transformed(lam), self.q)
        return float(rss), float(css)

    def __call__(self, lam: float) -> float:
        return self._loglik(lam, *self.rss(lam))

    def _loglik(self, lam: float, rss: float, css: float) -> float:
        if rss <= EXACT_FIT_RTOL**2 * css:
            if self.exact_at is None:
                self.exact_at = lam
            rss = max(rss, EXACT_FIT_RTOL**2 * css, np.finfo(float).tiny)
        return -0.5 * self.n * float(np.log(rss / self.n))

    def many(self, lams: np.ndarray, chunk: int = 8) -> np.ndarray:
        """L at each lambda, as :meth:`__call__` gives it, a few lambdas per matrix product
        (at 100,000 runs one product per lambda is most of the cost)."""
        out = []
        for start in range(0, len(lams), chunk):
            part = np.asarray(lams[start:start + chunk], dtype=float)
            small = np.abs(part) < 1e-12
            safe = np.where(small, 1.0, part)
            z = self.g * np.expm1(np.outer(self.d, safe)) / safe
            if small.any():
                z[:, small] = (self.g * self.d)[:, None]
            rss, css = _rss_css(z, self.q)
            out += [self._loglik(float(lam), float(a), float(b))
                    for lam, a, b in zip(part, rss, css, strict=True)]
        return np.array(out)


def profile_loglik(lam: float, y: np.ndarray, q: np.ndarray) -> float:
    """L(lambda) = -n/2 log(RSS/n) of the geometric-mean-scaled transform, for the model whose
    column space (including the intercept) is spanned by the orthonormal columns ``q``."""
    return _Profile(np.asarray(y, dtype=float), q)(lam)


def _refusal(y: np.ndarray, q: np.ndarray) -> str | None:
    n, p = q.shape
    if not np.all(np.isfinite(y)):
        return "the response has missing or non-finite values"
    if not np.all(y > 0):
        return "the response has zero or negative values"
    if n - p < 2:
        return "too few residual degrees of freedom"
    if np.ptp(y) == 0:
        return "every response value is the same"
    ones = np.ones(n) / np.sqrt(n)
    if np.linalg.norm(ones - q @ (q.T @ ones)) > 1e-8:
        return "the model has no intercept"
    return None


def _bracket(grid: np.ndarray, values: np.ndarray, lam_hat: float, bound: float,
             cut: float) -> tuple[float, float]:
    """The grid step, walking from ``lam_hat`` towards ``bound``, where the profile first falls
    below ``cut``: a bracket one step wide for the root finder (``bound`` itself is below)."""
    step = 1.0 if bound > lam_hat else -1.0
    ahead = [(float(g), float(v)) for g, v in zip(grid, values, strict=True)
             if step * (g - lam_hat) > 0]
    ahead.sort(key=lambda gv: step * (gv[0] - lam_hat))
    near = lam_hat
    for g, v in ahead:
        if v < cut:
            return near, g
        near = g
    return near, bound


def boxcox_profile(y: np.ndarray, q: np.ndarray, grid_size: int = GRID_SIZE) -> BoxCoxResult:
    """Maximum-likelihood lambda with its profile-likelihood 95 % CI and a suggestion.

    Parameters
    ----------
    y : (n,) response, all positive.
    q : (n, p) orthonormal basis of the model's column space; it must contain the intercept.

    Never raises for data it cannot use: the result then has ``lambda_hat`` None and a reason.
    """
    y = np.asarray(y, dtype=float)
    reason = _refusal(y, q)
    if reason:
        return not_estimated(reason)
    ll = _Profile(y, q)
    grid = np.linspace(*LAMBDA_RANGE, grid_size)
    values = ll.many(grid)
    i = int(np.argmax(values))
    lo, hi = grid[max(i - 1, 0)], grid[min(i + 1, grid_size - 1)]
    opt = optimize.minimize_scalar(lambda v: -ll(v), bounds=(lo, hi), method="bounded",
                                   options={"xatol": 1e-6})
    lam_hat = float(opt.x)
    if ll.exact_at is not None:
        return not_estimated(f"the model fits the transformed response exactly "
                             f"(near lambda = {ll.exact_at:.2f})")
    edge_tol = 1e-3 * (LAMBDA_RANGE[1] - LAMBDA_RANGE[0])
    at_edge = None
    for end in LAMBDA_RANGE:
        if abs(lam_hat - end) < edge_tol and ll(end) >= ll(lam_hat):
            at_edge, lam_hat = end, end
    best = ll(lam_hat)
    cut = best - 0.5 * CHI2_95_1DF

    def ci_end(bound: float) -> tuple[float, bool]:
        if lam_hat == bound or ll(bound) >= cut:
            return bound, True  # the interval runs to the edge of the range searched
        near, far = _bracket(grid, values, lam_hat, bound, cut)
        if ll(near) < cut:  # the grid's value and a fresh one disagree in the last digit
            near = lam_hat
        if far != bound and ll(far) >= cut:  # the same, at the other end of the bracket
            far = bound
        return float(optimize.brentq(lambda v: ll(v) - cut, near, far, xtol=1e-8)), False

    (ci_lo, open_lo), (ci_hi, open_hi) = ci_end(LAMBDA_RANGE[0]), ci_end(LAMBDA_RANGE[1])
    ci, ci_open = (ci_lo, ci_hi), (open_lo, open_hi)
    profile = tuple((float(g), float(v)) for g, v in zip(grid, values, strict=True))
    if at_edge is not None:
        suggestion, message = _suggest_at_edge(at_edge, ci, ci_open)
        reason = (f"the likelihood is highest at the edge of the range searched, {RANGE_TEXT} "
                  f"(lambda = {at_edge:g}), so there is no estimate inside it")
        return BoxCoxResult(None, ci, ci_open, True, suggestion, profile, message, reason)
    suggestion, message = _suggest(lam_hat, ci, ci_open)
    return BoxCoxResult(lam_hat, ci, ci_open, False, suggestion, profile, message, None)


def _ci_text(ci: tuple[float, float], ci_open: tuple[bool, bool]) -> str:
    text = f"95 % CI [{ci[0]:.2f}, {ci[1]:.2f}]"
    if any(ci_open):
        text += f" (reaching the edge of the range searched, {RANGE_TEXT})"
    return text


def _inside(ci: tuple[float, float]) -> list[tuple[float, str]]:
    return [(lam, name) for lam, name in CANDIDATES if ci[0] <= lam <= ci[1]]


def _suggest(lam_hat: float, ci: tuple[float, float],
             ci_open: tuple[bool, bool]) -> tuple[str, str]:
    inside = _inside(ci)
    text = f"lambda-hat = {lam_hat:.2f}, {_ci_text(ci, ci_open)}"
    if any(name == "none" for _, name in inside):
        return "none", f"{text} contains 1: no transformation is indicated."
    if inside:
        lam, name = min(inside, key=lambda c: abs(c[0] - lam_hat))
        return name, f"{text} excludes 1; try the {name} transform (lambda = {lam:g})."
    return "boxcox", (f"{text} excludes 1 and the usual choices; "
                      f"try Box-Cox with lambda = {lam_hat:.2f}.")


def _suggest_at_edge(edge: float, ci: tuple[float, float],
                     ci_open: tuple[bool, bool]) -> tuple[str | None, str]:
    inside = _inside(ci)
    text = (f"the likelihood is highest at the edge of the range searched, {RANGE_TEXT}, so "
            f"lambda has no estimate inside it; supported: {_ci_text(ci, ci_open)}")
    if any(name == "none" for _, name in inside):
        return "none", f"{text}, which contains 1: no transformation is indicated."
    if inside:
        lam, name = min(inside, key=lambda c: abs(c[0] - edge))
        return name, f"{text}, which excludes 1; try the {name} transform (lambda = {lam:g})."
    return None, (f"{text}, which excludes 1 and the usual choices: check the model form and the "
                  "runs flagged as outliers before transforming.")
