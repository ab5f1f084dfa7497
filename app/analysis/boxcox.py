"""Box–Cox profile likelihood for the model's own X: lambda-hat, 95 % CI and a suggestion.

Box & Cox (1964), J. R. Statist. Soc. B 26: the profile log-likelihood is
L(lambda) = -n/2 log(RSS(lambda) / n) + (lambda - 1) sum log y, RSS from regressing the
transformed response on X. RSS is computed as ||z||² - ||Q'z||² from the fit's QR, so each
lambda costs one pass over the data. The CI is {lambda : L >= L(lambda-hat) - chi2(0.95; 1)/2}.
Verified on the poisons data (lambda-hat near -0.75 for the additive model, Box & Cox, recalled
from memory) and against scipy.stats.boxcox_llf in tests/analysis/test_boxcox.py.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import optimize, stats

LAMBDA_RANGE = (-3.0, 3.0)
CHI2_95_1DF = float(stats.chi2.ppf(0.95, 1))
# Candidates the suggestion may name, with the transform each stands for.
CANDIDATES = ((1.0, "none"), (0.5, "sqrt"), (0.0, "log"), (-1.0, "inverse"))


@dataclass(frozen=True)
class BoxCoxResult:
    lambda_hat: float
    ci: tuple[float, float]
    suggestion: str
    profile: tuple[tuple[float, float], ...]
    message: str

    def to_dict(self) -> dict:
        return {"lambda_hat": self.lambda_hat, "ci": list(self.ci), "suggestion": self.suggestion,
                "profile": [{"lambda": lam, "log_likelihood": ll} for lam, ll in self.profile],
                "message": self.message}


def profile_loglik(lam: float, y: np.ndarray, q: np.ndarray, log_y: np.ndarray) -> float:
    """L(lambda) for the column space spanned by ``q``."""
    z = log_y if abs(lam) < 1e-12 else np.expm1(lam * log_y) / lam
    qz = q.T @ z
    rss = float(z @ z - qz @ qz)
    n = len(y)
    if rss <= 0:
        return float("inf")
    return -0.5 * n * np.log(rss / n) + (lam - 1.0) * float(np.sum(log_y))


def boxcox_profile(y: np.ndarray, q: np.ndarray, grid_size: int = 31) -> BoxCoxResult:
    """Maximum-likelihood lambda with its profile-likelihood 95 % CI and a suggestion."""
    log_y = np.log(y)
    def ll(lam: float) -> float:
        return profile_loglik(lam, y, q, log_y)
    grid = np.linspace(*LAMBDA_RANGE, grid_size)
    values = np.array([ll(g) for g in grid])
    if not np.all(np.isfinite(values)):
        raise ValueError("Box-Cox profile undefined: the model fits the response exactly")
    i = int(np.argmax(values))
    lo, hi = grid[max(i - 1, 0)], grid[min(i + 1, grid_size - 1)]
    opt = optimize.minimize_scalar(lambda v: -ll(v), bounds=(lo, hi), method="bounded",
                                   options={"xatol": 1e-6})
    lam_hat = float(opt.x)
    best = ll(lam_hat)
    cut = best - 0.5 * CHI2_95_1DF

    def edge(a: float, b: float) -> float:
        if ll(b) >= cut:
            return b  # the interval runs past the searched range
        return float(optimize.brentq(lambda v: ll(v) - cut, a, b, xtol=1e-8))

    ci = (edge(lam_hat, LAMBDA_RANGE[0]), edge(lam_hat, LAMBDA_RANGE[1]))
    suggestion, message = _suggest(lam_hat, ci)
    profile = tuple((float(g), float(v)) for g, v in zip(grid, values, strict=True))
    return BoxCoxResult(lam_hat, ci, suggestion, profile, message)


def _suggest(lam_hat: float, ci: tuple[float, float]) -> tuple[str, str]:
    inside = [(abs(lam - lam_hat), lam, name) for lam, name in CANDIDATES if ci[0] <= lam <= ci[1]]
    text = f"lambda-hat = {lam_hat:.2f}, 95 % CI [{ci[0]:.2f}, {ci[1]:.2f}]"
    if any(name == "none" for _, _, name in inside):
        return "none", f"{text} contains 1: no transformation is indicated."
    if inside:
        _, lam, name = min(inside)
        return name, f"{text} excludes 1; try the {name} transform (lambda = {lam:g})."
    return "boxcox", f"{text} excludes 1 and the usual choices; try Box-Cox with lambda = {lam_hat:.2f}."
