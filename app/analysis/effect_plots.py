"""Means behind main-effect and interaction plots: the mean observed response at each level of
a factor, and at each level of one factor with another held at one of its levels.

Column-wise (numpy unique and bincount), so a fit with 100,000 runs costs one pass per factor.
The means are checked against pandas groupby in tests/analysis/test_effect_plots.py.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

# A factor with at most this many distinct settings among the fitted runs (two levels, or two
# and a centre) is plotted from observed means; one with more (a central composite's five, a
# continuous factor) from the model's prediction, where a mean at a lone axial run says little.
OBSERVED_MAX_LEVELS = 3


@dataclass(frozen=True)
class LevelMeans:
    """The mean response at each distinct setting, in ascending order of the setting."""

    levels: np.ndarray
    means: np.ndarray
    runs: np.ndarray

    def to_dict(self) -> dict:
        return {"levels": self.levels.tolist(), "means": self.means.tolist(),
                "runs": self.runs.tolist()}


def level_means(setting: np.ndarray, response: np.ndarray) -> LevelMeans:
    """Mean of ``response`` at each distinct value of ``setting`` (runs with a missing response
    left out)."""
    setting, response = np.asarray(setting, dtype=float), np.asarray(response, dtype=float)
    keep = np.isfinite(response) & np.isfinite(setting)
    levels, inverse = np.unique(setting[keep], return_inverse=True)
    runs = np.bincount(inverse, minlength=len(levels))
    sums = np.bincount(inverse, weights=response[keep], minlength=len(levels))
    return LevelMeans(levels, sums / runs, runs)


def held_level_means(setting: np.ndarray, held: np.ndarray, held_at: float,
                     response: np.ndarray) -> LevelMeans:
    """Mean response at each setting of one factor among the runs whose other factor ``held``
    is at ``held_at`` (a line of an interaction plot)."""
    at = np.asarray(held, dtype=float) == held_at
    return level_means(np.asarray(setting, dtype=float)[at], np.asarray(response)[at])


def observed_plot_suits(setting: np.ndarray, categorical: bool) -> bool:
    """True when a factor's means are plotted from observed runs (see OBSERVED_MAX_LEVELS)."""
    values = np.asarray(setting, dtype=float)
    return categorical or len(np.unique(values[np.isfinite(values)])) <= OBSERVED_MAX_LEVELS


def two_factor_pairs(terms: list[dict]) -> list[tuple[str, str]]:
    """The factor pairs of a model's two-factor interaction terms (``A:B``), in term order."""
    pairs = []
    for term in terms:
        powers = term["powers"]
        if len(powers) == 2 and all(int(p) == 1 for _, p in powers):
            pairs.append((powers[0][0], powers[1][0]))
    return pairs
