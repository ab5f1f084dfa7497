"""Result documents for the setpoint tests: fitted with app.analysis, or written by hand."""

from __future__ import annotations

from itertools import product

import numpy as np
import pandas as pd

from app.analysis import Factor, FitSpec, analyse


def ccd(k: int, alpha: float, centre: int) -> np.ndarray:
    cube = np.array(list(product([-1.0, 1.0], repeat=k)))
    axial = np.vstack([np.eye(k) * alpha, -np.eye(k) * alpha])
    return np.vstack([cube, axial, np.zeros((centre, k))])


def fit(coded: np.ndarray, y: np.ndarray, response: str = "Y", names=("A", "B", "C"),
        levels=None, model: str = "quadratic", transform: str = "none") -> dict:
    """analyse(...).to_dict() for a table given in coded units; ``levels`` {name: (low, high)}
    turns the columns into actual units first."""
    levels = levels or {}
    data, factors = {}, []
    for j in range(coded.shape[1]):
        name = names[j]
        if name in levels:
            low, high = levels[name]
            data[name] = (low + high) / 2 + (high - low) / 2 * coded[:, j]
            factors.append(Factor(name, low, high))
        else:
            data[name] = coded[:, j]
            factors.append(Factor(name))
    data[response] = y
    frame = pd.DataFrame(data, index=pd.RangeIndex(1, len(y) + 1, name="row"))
    spec = FitSpec(response=response, factors=tuple(factors), model=model, transform=transform)
    return analyse(frame, spec).to_dict()


def quadratic_truth(coded: np.ndarray, b0: float, b: list, big_b: list) -> np.ndarray:
    big_b = np.asarray(big_b, dtype=float)
    return b0 + coded @ np.asarray(b, dtype=float) + np.einsum("ij,jk,ik->i", coded, big_b, coded)


def hand_model(terms: dict[str, float], intercept: float, names=("A", "B"), levels=None,
               design: dict | None = None, response: str = "Y", transform: str = "none") -> dict:
    """A result document written by hand: terms like "A", "A:B", "A^2" with coefficients.

    (X'X)^-1 is the identity and s = 1 with 10 residual df: enough for intervals; the tests
    using this check geometry and canonical analysis, not interval widths.
    """
    levels = levels or {}
    term_docs = []
    for name in terms:
        if "^" in name:
            f, p = name.split("^")
            powers = [[f, int(p)]]
        else:
            powers = [[f, 1] for f in name.split(":")]
        term_docs.append({"name": name, "powers": powers})
    factors = [{"name": n, "low": levels.get(n, (None, None))[0],
                "high": levels.get(n, (None, None))[1], "units": None} for n in names]
    p = 1 + len(terms)
    return {"response": response,
            "design": design or {"kind": "general", "rotatable": None, "alpha": None},
            "runs": [],
            "model": {"terms": term_docs, "coefficients": [intercept, *terms.values()],
                      "xtx_inv": np.eye(p).tolist(), "s": 1.0, "df_resid": 10,
                      "transform": transform, "lambda": None, "factors": factors,
                      "block_columns": []}}


ROTATABLE_2 = {"kind": "central_composite", "rotatable": True, "alpha": 2**0.5,
               "ccd_type": "circumscribed"}
