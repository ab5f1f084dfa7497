"""Building a plan: the design in coded units, its blocks, replicates and randomised run order,
with every run's settings in natural units."""

from __future__ import annotations

import itertools
import math
import secrets

import numpy as np

from ..aliases import alias_structure
from . import blocking, composite, fractions
from .factors import PlanError, checked_factors, natural_settings, split_categorical

DESIGNS = ("full_factorial", "fractional_factorial", "central_composite", "box_behnken")
MAX_FULL_FACTORS = 10  # 1,024 runs
MAX_REPLICATES = 20
FACTORIAL_CENTRE_POINTS = 3
CCD_MAX_FACTORS = 8


def build_plan(design: str, factors: list[dict], *, runs: int | None = None,
               centre_points: int | None = None, axial: str | None = None,
               blocks: int | None = None, replicates: int = 1, seed: int | None = None,
               generators: list[str] | None = None) -> dict:
    """A randomised run sheet for a designed experiment, as a JSON-able dict.

    ``factors`` are ``{"name", "low", "high", "units"?}`` in natural units. Keys returned:
    design, factors, seed, generators, alias, axial_distance, resolution, blocks, replicates,
    centre_points, runs (run_order, standard_order, label, block, coded, settings) and notes.
    Raises PlanError naming the field at fault.
    """
    if design not in DESIGNS:
        raise PlanError(f"choose the design from {', '.join(DESIGNS)}", "design")
    replicates = _count(replicates, "replicates", 1, MAX_REPLICATES)
    centre_points = None if centre_points is None else _count(centre_points, "centre_points",
                                                              0, 100)
    blocks = None if blocks is None else _count(blocks, "blocks", 1, 64)
    seed = _seed(seed)
    if design != "central_composite" and axial is not None:
        raise PlanError("the axial distance applies to central composite designs only", "axial")
    if design not in ("fractional_factorial",) and generators is not None:
        raise PlanError("generators apply to fractional factorials only", "generators")
    factors, crossed = split_categorical(factors)
    if design in ("full_factorial", "fractional_factorial"):
        part = _factorial(design, factors, runs, centre_points, blocks, generators)
    elif design == "central_composite":
        part = _central_composite(factors, runs, centre_points, axial, blocks)
    else:
        part = _box_behnken(factors, runs, centre_points, blocks)
    # Crossed with every combination of the categorical factors' levels: the whole design is
    # run at each (supplier A, B, C ...), in one randomised order.
    combos = list(itertools.product(*(f["levels"] for f in crossed))) or [()]
    design_coded = np.repeat(part["coded"], len(combos), axis=0)
    design_blocks = np.repeat(part["block"], len(combos))
    design_levels = combos * len(part["coded"])
    coded = np.tile(design_coded, (replicates, 1))
    block_of = np.tile(design_blocks, replicates)
    levels_of = design_levels * replicates
    order = _randomised(block_of, seed)
    names = [f["name"] for f in part["factors"]]
    settings = natural_settings(coded, part["factors"])
    width = max(2, len(str(len(coded))))
    sheet = []
    for position, row in enumerate(order, start=1):
        chosen = {f["name"]: level for f, level in zip(crossed, levels_of[row], strict=True)}
        sheet.append({
            "run_order": position, "standard_order": int(row) + 1,
            "label": f"R{position:0{width}d}", "block": int(block_of[row]),
            "coded": {**{n: float(coded[row, j]) for j, n in enumerate(names)}, **chosen},
            "settings": {**{n: float(settings[row, j]) for j, n in enumerate(names)},
                         **chosen}})
    notes = part["notes"]
    if crossed:
        notes.append("Crossed with " + ", ".join(f"{f['name']} ({', '.join(f['levels'])})"
                                                 for f in crossed)
                     + f": the design is run at each of the {len(combos)} level combinations.")
    if replicates > 1:
        notes.append(f"The whole design is run {replicates} times (centre points included); "
                     "the run order is randomised over all replicates within each block.")
    notes.append("Runs are in random order within each block, blocks one after another; the "
                 "same seed gives the same order." if int(block_of.max()) > 1 else
                 "Runs are in random order; the same seed gives the same order.")
    return {"design": design, "factors": part["factors"] + crossed, "seed": seed,
            "generators": part.get("generators", []), "alias": part.get("alias"),
            "axial_distance": part.get("axial_distance"),
            "resolution": part.get("resolution"), "blocks": int(block_of.max()),
            "block_effects": part.get("block_effects", []), "replicates": replicates,
            "centre_points": int(part["centre_points"]) * replicates, "runs": sheet,
            "notes": notes}


def _count(value, field: str, low: int, high: int) -> int:
    if isinstance(value, bool) or not isinstance(value, int) or not low <= value <= high:
        raise PlanError(f"give a whole number from {low} to {high}", field)
    return value


def _seed(seed) -> int:
    if seed is None:
        return secrets.randbelow(2**32)
    if isinstance(seed, bool) or not isinstance(seed, int) or seed < 0:
        raise PlanError("the seed is a whole number, 0 or more", "seed")
    return seed


def _randomised(block_of: np.ndarray, seed: int) -> np.ndarray:
    """Row indices in run order: blocks in turn, each permuted by one generator from the seed."""
    rng = np.random.default_rng(seed)
    order = []
    for b in np.unique(block_of):
        rows = np.flatnonzero(block_of == b)
        order.extend(rows[rng.permutation(len(rows))])
    return np.array(order, dtype=int)


def _with_centres(points: np.ndarray, point_blocks: np.ndarray, centres: int,
                  n_blocks: int) -> tuple[np.ndarray, np.ndarray]:
    """Append centre points, dealt to the blocks in turn."""
    k = points.shape[1]
    centre_blocks = (np.arange(centres) % n_blocks) + 1
    return (np.vstack([points, np.zeros((centres, k))]),
            np.concatenate([point_blocks, centre_blocks]).astype(int))


def _relation(gens: list[tuple[int, int, int]]) -> list[int]:
    return blocking.span([word | 1 << g for g, word, _ in gens])


def _factorial(design, factors, runs, centre_points, blocks, generators) -> dict:
    full = design == "full_factorial"
    factors = checked_factors(factors, at_least=2 if full else 3,
                              at_most=MAX_FULL_FACTORS if full else
                              fractions.MAX_FRACTION_FACTORS)
    names = [f["name"] for f in factors]
    k = len(factors)
    notes = []
    if full:
        if runs is not None and runs != 2**k:
            raise PlanError(f"a full factorial in {k} factors has {2**k} runs", "runs")
        gens = []
    elif generators is not None:
        if not isinstance(generators, list) or not generators:
            raise PlanError("give one generator per generated factor", "generators")
        gens = fractions.parse_generators(generators, names)
        if runs is not None and runs != 2 ** (k - len(gens)):
            raise PlanError(f"{len(gens)} generators in {k} factors make "
                            f"{2 ** (k - len(gens))} runs", "runs")
        notes.append("Generators as given, not from the published table.")
    else:
        if k > max(kk for kk, _ in fractions.PUBLISHED):
            raise PlanError(f"the published table goes to 11 factors; give generators for {k}",
                            "factors")
        listed = fractions.run_counts(k)
        if runs is None:
            runs = fractions.default_runs(k)
            notes.append(f"{runs} runs: the fewest the table lists at the highest resolution "
                         "that keeps main effects clear of two-factor interactions (IV), or "
                         "the largest listed fraction.")
        if runs not in listed:
            raise PlanError(f"for {k} factors choose {', '.join(map(str, listed))} runs "
                            f"(or a full factorial of {2**k})", "runs")
        gens = fractions.published(k, runs)[1]
        notes.append("Generators of highest resolution and minimum aberration from Montgomery, "
                     "Design and Analysis of Experiments, Table 8.14 (Box, Hunter & Hunter, "
                     "Table 6.22).")
    cube = fractions.cube_points(k, gens)
    relation = _relation(gens)
    generated = {g for g, _, _ in gens}
    base = [i for i in range(k) if i not in generated]
    n_blocks = blocks or 1
    block_words = []
    if n_blocks > 1:
        block_words = blocking.block_words(k, n_blocks, base=base, relation=relation)
        point_blocks = blocking.block_numbers(cube, block_words)
        notes.append("Blocks confound " + ", ".join(
            blocking.confounded_with_blocks(block_words, relation, names)) + (
            " (Montgomery, Table 7.8)." if full else
            " (chosen among the fraction's columns to confound the highest-order effects)."))
    else:
        point_blocks = np.ones(len(cube), dtype=int)
    if centre_points is None:
        centre_points = FACTORIAL_CENTRE_POINTS if n_blocks == 1 else 2 * n_blocks
        notes.append(f"{centre_points} centre points by default: they give a curvature test "
                     "and pure error without changing the factorial estimates"
                     + (", two in each block." if n_blocks > 1 else "."))
    coded, block_of = _with_centres(cube, point_blocks, centre_points, n_blocks)
    alias = None if full else alias_structure(cube, names)
    return {"factors": factors, "coded": coded, "block": block_of, "notes": notes,
            "generators": [fractions.generator_text(g, names) for g in gens],
            "alias": alias, "resolution": None if full else alias["resolution"],
            "centre_points": centre_points,
            "block_effects": (blocking.confounded_with_blocks(block_words, relation, names)
                              if block_words else [])}


def _ccd_cube(k: int) -> tuple[np.ndarray, list, int | None]:
    """The cube part: the full 2^k up to 4 factors, then the smallest published fraction of
    resolution V or higher (all main effects and two-factor interactions clear)."""
    if k <= 4:
        return fractions.cube_points(k, []), [], None
    runs = min(r for r in fractions.run_counts(k) if fractions.PUBLISHED[(k, r)][0] >= 5)
    resolution, gens = fractions.published(k, runs)
    return fractions.cube_points(k, gens), gens, resolution


def _central_composite(factors, runs, centre_points, axial, blocks) -> dict:
    factors = checked_factors(factors, at_least=2, at_most=CCD_MAX_FACTORS)
    names = [f["name"] for f in factors]
    k = len(factors)
    if runs is not None:
        raise PlanError("the run count of a central composite design follows from the "
                        "factors and centre points", "runs")
    if blocks not in (None, 1, 2):
        raise PlanError("a central composite design is blocked here in two blocks (cube, "
                        "axial)", "blocks")
    if axial is None:
        axial = "orthogonal" if blocks == 2 else "rotatable"
    if axial not in composite.AXIAL_CHOICES:
        raise PlanError(f"choose the axial distance from {', '.join(composite.AXIAL_CHOICES)}",
                        "axial")
    n_blocks = 2 if axial == "orthogonal" else (blocks or 1)
    notes = []
    if centre_points is None:
        centre_points = composite.CCD_CENTRE_POINTS[k]
        notes.append(f"{centre_points} centre points by default: the near uniform-precision "
                     "number of Box & Hunter (1957).")
    centre_cube = math.ceil(centre_points / 2) if n_blocks == 2 else centre_points
    centre_axial = centre_points - centre_cube
    cube, gens, resolution = _ccd_cube(k)
    alpha = composite.axial_distance(axial, len(cube), k, centre_cube, centre_axial)
    # inscribed: the axial runs at the given low and high, the cube shrunk inside them
    scale, position = (1.0 / alpha, 1.0) if axial == "inscribed" else (1.0, alpha)
    coded = np.vstack([cube * scale, composite.axial_points(k, position),
                       np.zeros((centre_points, k))])
    if n_blocks == 2:
        block_of = np.concatenate([np.ones(len(cube)), np.full(2 * k, 2),
                                   np.ones(centre_cube), np.full(centre_axial, 2)]).astype(int)
        notes.append(f"Two blocks: the cube with {centre_cube} centre points, the axial runs "
                     f"with {centre_axial}.")
    else:
        block_of = np.ones(len(coded), dtype=int)
    natural = natural_settings(np.array([[-position] * k, [position] * k]), factors)
    if position > 1:
        notes.append("The axial runs lie outside the low and high levels given; check that "
                     "the process can be run there, or choose face-centred or inscribed "
                     "axial runs.")
    if gens:
        notes.append(f"The cube is the published 2^({k}-{len(gens)}) fraction of resolution "
                     f"{resolution}.")
    return {"factors": factors, "coded": coded, "block": block_of, "notes": notes,
            "generators": [fractions.generator_text(g, names) for g in gens],
            "resolution": resolution, "centre_points": centre_points,
            "axial_distance": {"kind": axial, "alpha": alpha, "coded": position,
                               "settings": {n: [float(natural[0, j]), float(natural[1, j])]
                                            for j, n in enumerate(names)}}}


# Box & Behnken (1960) give orthogonal blocks for 4 factors (three) and 5 factors (two): the
# pair rows of composite.BOX_BEHNKEN_BLOCKS are listed block by block.
BOX_BEHNKEN_BLOCKING = {(4, 3), (5, 2)}


def _box_behnken(factors, runs, centre_points, blocks) -> dict:
    factors = checked_factors(factors, at_least=3, at_most=7)
    k = len(factors)
    if runs is not None:
        raise PlanError("the run count of a Box–Behnken design follows from the factors and "
                        "centre points", "runs")
    n_blocks = blocks or 1
    if n_blocks > 1 and (k, n_blocks) not in BOX_BEHNKEN_BLOCKING:
        raise PlanError("Box & Behnken give orthogonal blocks for 4 factors (3 blocks) and 5 "
                        "factors (2 blocks) only", "blocks")
    notes = []
    if centre_points is None:
        centre_points = composite.BOX_BEHNKEN_CENTRE_POINTS[k]
        notes.append(f"{centre_points} centre points by default, as in Box & Behnken (1960).")
    if n_blocks > 1 and centre_points % n_blocks:
        raise PlanError(f"give a multiple of {n_blocks} centre points, the same in each block",
                        "centre_points")
    points = composite.box_behnken_points(k)
    per_block = len(points) // n_blocks
    point_blocks = np.arange(len(points)) // per_block + 1
    coded, block_of = _with_centres(points, point_blocks, centre_points, n_blocks)
    return {"factors": factors, "coded": coded, "block": block_of, "notes": notes,
            "centre_points": centre_points}
