"""Shared builders for the analysis tests: designs, frames and reference-file loaders."""

from __future__ import annotations

import json
from itertools import product
from pathlib import Path

import numpy as np
import pandas as pd

# Published reference files with their sources: tests/data/reference/README.md
REFERENCE = Path(__file__).resolve().parents[1] / "data" / "reference"


def load_json(name: str) -> dict:
    return json.loads((REFERENCE / name).read_text())


def dataplot_rows(name: str, skip: int) -> np.ndarray:
    """Numeric rows of an e-Handbook Dataplot file after ``skip`` header lines."""
    rows = []
    for line in (REFERENCE / name).read_text().splitlines()[skip:]:
        values = []
        for part in line.split():
            try:
                values.append(float(part))
            except ValueError:
                break  # a trailing text column (e.g. a +/- pattern) ends the numbers
        if values:
            rows.append(values)
    width = max(len(r) for r in rows)
    return np.array([r for r in rows if len(r) == width])


def full_factorial(k: int) -> np.ndarray:
    """2^k in standard (Yates) order: first factor changes fastest."""
    return np.array([row[::-1] for row in product([-1.0, 1.0], repeat=k)])


def ccd(k: int, alpha: float, centre: int) -> np.ndarray:
    cube = full_factorial(k)
    axial = np.vstack([np.eye(k) * alpha, -np.eye(k) * alpha])
    return np.vstack([cube, axial, np.zeros((centre, k))])


def box_behnken3(centre: int = 3) -> np.ndarray:
    rows = []
    for i, j in ((0, 1), (0, 2), (1, 2)):
        for a, b in product([-1.0, 1.0], repeat=2):
            r = [0.0, 0.0, 0.0]
            r[i], r[j] = a, b
            rows.append(r)
    return np.vstack([np.array(rows), np.zeros((centre, 3))])


def frame_from(coded: np.ndarray, y: np.ndarray, names=("A", "B", "C", "D", "E"),
               **extra) -> pd.DataFrame:
    data = {names[j]: coded[:, j] for j in range(coded.shape[1])}
    data["Y"] = y
    data.update(extra)
    return pd.DataFrame(data, index=pd.RangeIndex(1, len(y) + 1, name="row"))
