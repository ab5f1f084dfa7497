"""Recognising the design: factorial, fraction, central composite, Box–Behnken or general.

Works on coded settings only. Values are compared after rounding to 1e-6 coded units, which is
far finer than any level spacing a real design uses but absorbs printing of actual levels.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass
from itertools import combinations

import numpy as np

_TOL = 1e-6


@dataclass(frozen=True)
class DesignInfo:
    """What the coded settings look like.

    ``kind`` is one of ``two_level_full_factorial``, ``two_level_fractional_factorial``,
    ``central_composite``, ``box_behnken`` or ``general``. ``ccd_type`` is ``circumscribed``,
    ``face_centred`` or ``inscribed`` for a central composite design. ``alpha`` is the axial
    distance relative to the cube points. ``pure_error_df`` counts replicated runs: the sum over
    distinct settings (within a block) of runs minus one.
    """

    kind: str
    n_runs: int
    n_factors: int
    n_cube: int
    n_axial: int
    n_centre: int
    n_other: int
    two_level: bool
    ccd_type: str | None
    alpha: float | None
    rotatable: bool | None
    resolution: int | None
    distinct_settings: int
    replicated_settings: int
    pure_error_df: int
    blocks: int

    def to_dict(self) -> dict:
        return asdict(self)


def setting_groups(coded: np.ndarray, blocks: np.ndarray | None = None) -> np.ndarray:
    """An integer label per run; runs with the same label share settings (and block)."""
    keys = np.round(coded / _TOL).astype(np.int64)
    columns = [keys[:, j] for j in range(keys.shape[1])]
    if blocks is not None:
        columns.append(np.unique(np.asarray(blocks, dtype=str), return_inverse=True)[1].ravel())
    # Combine per-column level codes in mixed radix: one 1-D unique instead of a row-wise one.
    combined = np.zeros(len(coded), dtype=np.int64)
    radix = 1
    for col in columns:
        _, codes = np.unique(col, return_inverse=True)
        levels = int(codes.max()) + 1 if len(codes) else 1
        if radix * levels > 2**62:
            _, combined = np.unique(np.column_stack([combined, codes]), axis=0, return_inverse=True)
            combined = combined.ravel().astype(np.int64)
            radix = int(combined.max()) + 1
        else:
            combined = combined + codes.ravel() * radix
            radix *= levels
    _, labels = np.unique(combined, return_inverse=True)
    return labels.ravel()


def _resolution(cube_points: np.ndarray) -> int | None:
    """Shortest word of the defining relation of a regular two-level fraction."""
    k = cube_points.shape[1]
    if k > 12:
        return None
    shortest = None
    for order in range(2, k + 1):
        for combo in combinations(range(k), order):
            prod = np.prod(cube_points[:, combo], axis=1)
            if np.all(prod == prod[0]):
                shortest = order
                break
        if shortest is not None:
            break
    return shortest


def _near(a: np.ndarray | float, b: float) -> np.ndarray | bool:
    return np.abs(np.asarray(a) - b) < 1e-4


def describe_design(coded: np.ndarray, blocks: np.ndarray | None = None,
                    categorical: tuple[int, ...] = (), *,
                    groups: np.ndarray | None = None) -> DesignInfo:
    """Classify the design from its coded settings.

    ``categorical`` lists the columns that hold a categorical factor's level numbers: such a
    design is ``general`` (the named kinds are built from numeric levels); its runs count as
    centre runs when every continuous factor is at its centre, and the level joins the
    settings that define replicates. ``groups``, when the caller has them, are the labels
    :func:`setting_groups` gives for these runs (found once for a fit of 100,000 runs).

    Verified against hand-built 2^k, 2^(k-p), CCD (α = 1.682, 1, inscribed), Box–Behnken and
    random designs in tests/analysis/test_design.py.
    """
    n, k = coded.shape
    if groups is None:
        groups = setting_groups(coded, blocks)
    counts = np.bincount(groups)
    pure_error_df = int(np.sum(counts - 1))
    n_blocks = 1 if blocks is None else len({str(b) for b in blocks})
    if categorical:
        continuous = np.delete(coded, list(categorical), axis=1)
        n_centre = (int((~(np.abs(continuous) > 1e-4).any(axis=1)).sum())
                    if continuous.shape[1] else 0)
        return DesignInfo(
            kind="general", n_runs=n, n_factors=k, n_cube=0, n_axial=0, n_centre=n_centre,
            n_other=n - n_centre, two_level=False, ccd_type=None, alpha=None, rotatable=None,
            resolution=None, distinct_settings=int(len(counts)),
            replicated_settings=int(np.sum(counts > 1)), pure_error_df=pure_error_df,
            blocks=n_blocks)
    absval = np.abs(coded)
    nonzero = absval > 1e-4
    centre = ~nonzero.any(axis=1)
    row_max = absval.max(axis=1) if k else np.zeros(n)
    all_nonzero = nonzero.all(axis=1)
    cube_level = None
    cube = np.zeros(n, bool)
    if all_nonzero.any():
        # cube points: every factor at the same magnitude
        spread = absval.max(axis=1) - absval.min(axis=1)
        candidates = all_nonzero & (spread < 1e-4)
        if candidates.any():
            cube_level = float(np.median(row_max[candidates]))
            cube = candidates & _near(row_max, cube_level)
    single = nonzero.sum(axis=1) == 1
    axial = single & ~cube if k > 1 else np.zeros(n, bool)
    kind, ccd_type, alpha, rotatable, resolution = "general", None, None, None, None
    two_level = False
    other = ~(cube | centre | axial)
    if cube.any() and not axial.any() and not other.any():
        two_level = _near(cube_level, 1.0)
        distinct = np.unique(np.sign(coded[cube]), axis=0)
        if two_level and len(distinct) == 2**k:
            kind = "two_level_full_factorial"
        elif two_level and np.allclose(distinct.sum(axis=0), 0) and _is_power_of_two(len(distinct)):
            kind = "two_level_fractional_factorial"
            resolution = _resolution(distinct)
    elif cube.any() and axial.any() and not other.any():
        axial_levels = row_max[axial]
        signed = np.sign(coded[axial])
        # a composite design has axial runs at both ends of every factor's axis
        covered = all(np.any(signed[:, j] > 0) and np.any(signed[:, j] < 0) for j in range(k))
        if covered and np.allclose(axial_levels, axial_levels[0], atol=1e-4):
            alpha = float(axial_levels[0] / cube_level)
            kind = "central_composite"
            if _near(alpha, 1.0):
                ccd_type = "face_centred"
            elif alpha > 1 and _near(cube_level, 1.0):
                ccd_type = "circumscribed"
            elif alpha > 1 and _near(axial_levels[0], 1.0):
                ccd_type = "inscribed"
            else:
                ccd_type = "circumscribed" if alpha > 1 else None
            n_f = len(np.unique(np.sign(coded[cube]), axis=0))
            rotatable = bool(abs(alpha - n_f**0.25) < 0.01)
    elif k >= 3 and not cube.any() and not axial.any():
        levels = np.unique(np.round(coded, 4))
        n_nonzero = nonzero.sum(axis=1)[~centre]
        if (
            len(n_nonzero)
            and np.all(np.isin(levels, (-1.0, 0.0, 1.0)))
            and np.all(n_nonzero == n_nonzero[0])
            and 2 <= n_nonzero[0] < k
        ):
            kind = "box_behnken"
    return DesignInfo(
        kind=kind,
        n_runs=n,
        n_factors=k,
        n_cube=int(cube.sum()),
        n_axial=int(axial.sum()),
        n_centre=int(centre.sum()),
        n_other=int(other.sum()) if kind == "general" else 0,
        two_level=bool(two_level),
        ccd_type=ccd_type,
        alpha=alpha,
        rotatable=rotatable,
        resolution=resolution,
        distinct_settings=int(len(counts)),
        replicated_settings=int(np.sum(counts > 1)),
        pure_error_df=pure_error_df,
        blocks=n_blocks,
    )


def _is_power_of_two(m: int) -> bool:
    return m > 0 and (m & (m - 1)) == 0
