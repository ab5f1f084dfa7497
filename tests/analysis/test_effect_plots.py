"""Means behind the main-effect and interaction plots, against pandas groupby."""

from __future__ import annotations

import numpy as np
import pandas as pd
from numpy.testing import assert_allclose

from app.analysis.effect_plots import (
    held_level_means,
    level_means,
    observed_plot_suits,
    two_factor_pairs,
)


def test_level_means_match_pandas_groupby():
    rng = np.random.default_rng(5)
    a = rng.choice([-1.0, 0.0, 1.0], size=40)
    b = rng.choice([10.0, 20.0], size=40)
    y = rng.normal(size=40)
    y[3] = np.nan  # a missing response is left out, as groupby's mean skips it
    frame = pd.DataFrame({"a": a, "b": b, "y": y})
    expected = frame.groupby("a")["y"].agg(["mean", "count"])
    got = level_means(a, y)
    assert_allclose(got.levels, expected.index.to_numpy(), rtol=0, atol=0)
    assert_allclose(got.means, expected["mean"].to_numpy(), rtol=1e-12)
    assert got.runs.tolist() == expected["count"].tolist()

    cells = frame[frame["b"] == 20.0].groupby("a")["y"].mean()
    held = held_level_means(a, b, 20.0, y)
    assert_allclose(held.levels, cells.index.to_numpy(), rtol=0, atol=0)
    assert_allclose(held.means, cells.to_numpy(), rtol=1e-12)


def test_observed_means_for_few_levels_prediction_beyond():
    assert observed_plot_suits(np.array([-1.0, 1.0, 0.0, 1.0]), categorical=False)
    assert not observed_plot_suits(np.array([-1.68, -1.0, 0.0, 1.0, 1.68]), categorical=False)
    assert observed_plot_suits(np.arange(1.0, 8.0), categorical=True)


def test_two_factor_pairs_are_the_interaction_terms():
    terms = [{"name": "A", "powers": [["A", 1]]}, {"name": "A:B", "powers": [["A", 1], ["B", 1]]},
             {"name": "A^2", "powers": [["A", 2]]},
             {"name": "A:B:C", "powers": [["A", 1], ["B", 1], ["C", 1]]}]
    assert two_factor_pairs(terms) == [("A", "B")]
