"""Design-exact null distributions for residual statistics, and the battery's min-P adjustment.

Under the hypothesis the residual checks test (the model is right, errors iid normal) the
residual vector is e = M z σ with M = I − H from the fit's own model matrix and z standard
normal. A statistic that does not depend on σ therefore has a null distribution fixed by the
design alone, which a simulation of M z reproduces for this design exactly, up to Monte Carlo
error: with B draws the standard error of a p-value p is sqrt(p(1 − p)/B), 0.0022 at p = 0.01
for B = 2000. Textbook p-values assume iid residuals, which least-squares residuals are not
(var eᵢ = σ²(1 − hᵢᵢ), and they are correlated), so on small designed experiments they cry wolf.

The draws are made once per fit, as one array, from a seed derived from the fit's inputs (so
every p reproduces exactly) and stored with the draw count. Above ``ASYMPTOTIC_ABOVE`` runs the
leverages are small and alike, and the textbook (asymptotic) p-values are used instead.

The checks of one fit are one family. Verdicts follow step-down min-P adjusted p-values
(Westfall & Young 1993, Resampling-Based Multiple Testing), computed on the same draws: each
check is compared with the smallest null p-value among the checks not yet rejected, as in
Holm's method but with the checks' joint null distribution. That controls the family-wise rate
of false alarms at each threshold whatever the dependence between checks. Without draws the
fallback is Holm's (1979) step-down method.
"""

from __future__ import annotations

import hashlib
import json
from dataclasses import dataclass
from functools import cache

import numpy as np

DRAWS = 2000
# Above this many runs the leverages are at most a few p/n and the asymptotic p-values serve.
ASYMPTOTIC_ABOVE = 400
WESTFALL_YOUNG = "Westfall-Young step-down min-P on the simulated draws"
HOLM = "Holm step-down"


@dataclass(frozen=True)
class NullDraws:
    """B simulated residual vectors M z (σ = 1), one per row, for the fit's own model matrix."""

    residuals: np.ndarray
    seed: int

    @property
    def count(self) -> int:
        return int(self.residuals.shape[0])


def seed_for(*arrays: np.ndarray, text: str = "") -> int:
    """A 63-bit seed from the bytes of the fit's inputs: the same inputs give the same draws."""
    digest = hashlib.sha256()
    for a in arrays:
        digest.update(np.ascontiguousarray(a, dtype=float).tobytes())
    digest.update(text.encode())
    return int.from_bytes(digest.digest()[:8], "big") >> 1


def null_draws(q: np.ndarray, seed: int, draws: int = DRAWS) -> NullDraws:
    """M z for ``draws`` standard-normal z, with M = I − QQ' from the fit's thin Q."""
    z = np.random.default_rng(seed).standard_normal((draws, q.shape[0]))
    return NullDraws(z - (z @ q) @ q.T, seed)


def upper_p(observed: float, null: np.ndarray) -> float:
    """P(T ≥ observed) under the simulated null, (1 + #{T_b ≥ t}) / (B + 1) (never zero)."""
    null = np.asarray(null, dtype=float)
    return float((1 + np.count_nonzero(null >= observed * (1 - 1e-12))) / (len(null) + 1))


def null_p_values(null: np.ndarray) -> np.ndarray:
    """Each draw's own upper-tail p-value within the null sample, #{T_b' ≥ T_b} / B."""
    null = np.asarray(null, dtype=float)
    ordered = np.sort(null)
    return (len(null) - np.searchsorted(ordered, null, side="left")) / len(null)


def min_p_adjusted(observed: np.ndarray, null_p: np.ndarray) -> np.ndarray:
    """Step-down min-P adjusted p-values (Westfall & Young 1993).

    ``observed`` holds the m checks' p-values, ``null_p`` (B × m) their p-values on each draw.
    With the checks ordered p₍₁₎ ≤ … ≤ p₍ₘ₎, p̃₍ⱼ₎ = max over i ≤ j of
    (1 + #{b : min over k ≥ i of P₍ₖ₎(b) ≤ p₍ᵢ₎}) / (B + 1): each check is compared with the
    smallest null p among the checks not yet rejected, which is never less powerful than the
    single-step form and controls the same family-wise rate.
    """
    observed = np.asarray(observed, dtype=float)
    order = np.argsort(observed, kind="stable")
    p_sorted = observed[order]
    # successive minima from the right: column j holds min over the checks ordered j..m
    tail_min = np.minimum.accumulate(null_p[:, order][:, ::-1], axis=1)[:, ::-1]
    hits = np.sum(tail_min <= p_sorted[None, :] * (1 + 1e-12), axis=0)
    stepped = np.maximum.accumulate((1 + hits) / (null_p.shape[0] + 1))
    out = np.empty_like(observed)
    out[order] = np.maximum(stepped, p_sorted)
    return np.minimum(out, 1.0)


def holm(observed: np.ndarray) -> np.ndarray:
    """Holm's step-down adjusted p-values (monotone, capped at 1)."""
    p = np.asarray(observed, dtype=float)
    m = len(p)
    order = np.argsort(p)
    stepped = np.maximum.accumulate((m - np.arange(m)) * p[order])
    out = np.empty(m)
    out[order] = np.minimum(stepped, 1.0)
    return out


# What a pass is worth. Each check that looks for one kind of defect is also tried against a
# moderate case of it, simulated for this design (same model matrix, same run order): when it
# would clearly flag that defect at the review threshold in fewer than POWER_FLOOR of
# experiments — twice the false-alarm rate at the default threshold — a pass would say nothing,
# and the check says so instead of passing ("clearly": the rate is below the floor by three
# Monte Carlo standard errors). The defect sizes are those of `make calibrate` (unit error SD).
POWER_DRAWS = 500
POWER_FLOOR = 0.10
DEFECTS = {
    "ar1": "AR(1) errors in run order with ρ = 0.6",
    "drift": "a linear drift of 3 error SDs over the run sequence",
    "spread": "the error SD doubled at the high side of the factor",
    "megaphone": "an error SD that doubles from the lowest to the highest fitted value",
    "outlier": "one run off by 4 error SDs",
}


def defect_residuals(q: np.ndarray, seed: int, kind: str, *,
                     position: np.ndarray | None = None, high: np.ndarray | None = None,
                     fitted: np.ndarray | None = None,
                     draws: int = POWER_DRAWS) -> np.ndarray:
    """M u for errors u carrying defect ``kind`` (see DEFECTS), one residual vector per row.

    ``position`` is each run's place in time (0-based), for ``ar1`` and ``drift``; ``high``
    marks the runs whose SD doubles, for ``spread``; ``fitted`` for ``megaphone``.
    """
    n = q.shape[0]
    rng = np.random.default_rng([seed, list(DEFECTS).index(kind) + 1])
    z = rng.standard_normal((draws, n))
    if kind == "ar1":
        u = np.empty_like(z)
        u[:, 0] = z[:, 0] / np.sqrt(1 - 0.36)  # stationary start
        for t in range(1, n):
            u[:, t] = 0.6 * u[:, t - 1] + z[:, t]
        z = u[:, position]
    elif kind == "drift":
        z = z + 3.0 * (position / max(n - 1, 1) - 0.5)
    elif kind == "spread":
        z = z * np.where(high, 2.0, 1.0)
    elif kind == "megaphone":
        span = np.ptp(fitted)
        z = z * 2.0 ** ((fitted - fitted.min()) / (span if span > 0 else 1.0))
    elif kind == "outlier":
        z[np.arange(draws), rng.integers(n, size=draws)] += 4.0
    else:
        raise ValueError(f"unknown defect '{kind}'")
    return z - (z @ q) @ q.T


def detection_rate(null: np.ndarray, defect: np.ndarray, alpha: float) -> float:
    """Share of defect draws beyond the null's upper alpha point (larger = worse)."""
    return float(np.mean(defect > np.quantile(null, 1.0 - alpha)))


def rates_for_design(design: dict, model: str | None) -> dict | None:
    """The `make calibrate` line for this fit's design, or None when it was not simulated.

    Matches on the design's kind, run count and factor count and the named model.
    """
    table = _calibration_table()
    for entry in table.get("designs", {}).values():
        if (entry["kind"] == design.get("kind") and entry["n_runs"] == design.get("n_runs")
                and entry["n_factors"] == design.get("n_factors") and entry["model"] == model):
            return entry
    return None


@cache
def _calibration_table() -> dict:
    from importlib.resources import files

    source = files("app").joinpath("data", "calibration.json")
    return json.loads(source.read_text()) if source.is_file() else {}
