"""Response-surface designs: central composite and Box–Behnken, in coded units."""

from __future__ import annotations

from itertools import product

import numpy as np

from .factors import PlanError

AXIAL_CHOICES = ("rotatable", "face_centred", "inscribed", "orthogonal")

# Centre points for near uniform precision of a rotatable central composite design, by number of
# factors (cube part a half fraction from 5 factors): Box & Hunter (1957), "Multi-factor
# experimental designs for exploring response surfaces", Ann. Math. Statist. 28, Table 4, as
# reprinted in Montgomery, Design and Analysis of Experiments, Table 11.x. Recalled from memory.
CCD_CENTRE_POINTS = {2: 5, 3: 6, 4: 7, 5: 6, 6: 9, 7: 14, 8: 20}

# Box & Behnken (1960), "Some new three level designs for the study of quantitative variables",
# Technometrics 2, 455-475: each row of the incomplete-block table names the factors that move
# together through a two-level factorial (the others at their centre). Runs without centre points:
# 3 factors 12, 4: 24, 5: 40, 6: 48, 7: 56; the centre points are the paper's (3 factors 3,
# 4: 3, 5: 6, 6: 6, 7: 6). Counts and blocks recalled from memory of the paper's table.
BOX_BEHNKEN_BLOCKS: dict[int, tuple[tuple[int, ...], ...]] = {
    3: ((0, 1), (0, 2), (1, 2)),
    # the paper lists these pairs in three orthogonal blocks: {AB, CD}, {AD, BC}, {AC, BD}
    4: ((0, 1), (2, 3), (0, 3), (1, 2), (0, 2), (1, 3)),
    5: ((0, 1), (2, 3), (1, 4), (0, 2), (3, 4), (1, 2), (0, 4), (1, 3), (0, 3), (2, 4)),
    6: ((0, 1, 3), (1, 2, 4), (2, 3, 5), (0, 3, 4), (1, 4, 5), (0, 2, 5)),
    7: ((3, 4, 5), (0, 5, 6), (1, 4, 6), (0, 1, 3), (2, 3, 6), (1, 2, 5), (0, 2, 4)),
}
BOX_BEHNKEN_CENTRE_POINTS = {3: 3, 4: 3, 5: 6, 6: 6, 7: 6}


def axial_distance(axial: str, n_cube: int, k: int, centre_cube: int, centre_axial: int) -> float:
    """The coded axial distance alpha relative to the cube points at ±1.

    rotatable: alpha = n_F^(1/4) (Box & Hunter 1957; Montgomery §11.4.1); face-centred: 1;
    inscribed: the rotatable alpha, then everything is divided by it; orthogonal: the design
    blocks orthogonally in two blocks (cube + its centre points, axial + its centre points) when
    every block's share of sum x_i^2 matches its share of runs, n_F / (n_F + c_F) = 2 alpha^2 /
    (2k + c_A), i.e. alpha = sqrt(n_F (2k + c_A) / (2 (n_F + c_F))) (Box & Hunter 1957;
    Montgomery §11.4.3).
    """
    if axial in ("rotatable", "inscribed"):
        return n_cube ** 0.25
    if axial == "face_centred":
        return 1.0
    if axial == "orthogonal":
        return float(np.sqrt(n_cube * (2 * k + centre_axial) / (2 * (n_cube + centre_cube))))
    raise PlanError(f"choose the axial distance from {', '.join(AXIAL_CHOICES)}", "axial")


def axial_points(k: int, alpha: float) -> np.ndarray:
    """±alpha on each axis in turn: (-a, 0...), (+a, 0...), (0, -a, ...), ..."""
    rows = np.zeros((2 * k, k))
    for j in range(k):
        rows[2 * j, j], rows[2 * j + 1, j] = -alpha, alpha
    return rows


def box_behnken_points(k: int) -> np.ndarray:
    """The Box–Behnken runs without centre points, block row by block row."""
    if k not in BOX_BEHNKEN_BLOCKS:
        raise PlanError("a Box–Behnken design is built here for 3 to 7 factors", "factors")
    rows = []
    for group in BOX_BEHNKEN_BLOCKS[k]:
        for signs in product((-1.0, 1.0), repeat=len(group)):
            row = np.zeros(k)
            row[list(group)] = signs[::-1]
            rows.append(row)
    return np.array(rows)
