"""Plans (app/analysis/plans) against published design tables and independent computations.

Sources, named beside each check:
- BHH: Box, Hunter & Hunter, Statistics for Experimenters (2nd ed., 2005), ch. 5-6.
- Montgomery: Design and Analysis of Experiments (8th ed.), Tables 7.8, 8.14, ch. 11.
- Box & Behnken (1960), Technometrics 2, 455-475.
Table values below are recalled from memory of those books and are marked so; each is also
checked by an independent computation in this file (brute-force search, scipy, statsmodels).
"""

from itertools import combinations

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy import stats
from statsmodels.stats.outliers_influence import variance_inflation_factor

from app.analysis.design import describe_design
from app.analysis.plans import PlanError, blocking, build_plan, evaluate_plan, fractions
from app.analysis.terms import model_matrix, named_model

LETTERS = "ABCDEFGHJKL"


def factors(k, low=0.0, high=1.0):
    return [{"name": LETTERS[i], "low": low, "high": high} for i in range(k)]


def coded_of(plan):
    names = [f["name"] for f in plan["factors"]]
    return np.array([[run["coded"][n] for n in names] for run in plan["runs"]])


def blocks_of(plan):
    return np.array([run["block"] for run in plan["runs"]])


def described(plan):
    blocks = blocks_of(plan) if plan["blocks"] > 1 else None
    return describe_design(coded_of(plan), blocks)


# --- two-level fractions --------------------------------------------------------------------

def test_half_fraction_of_five_factors_is_resolution_five_with_e_equal_abcd():
    # BHH ch. 6 (recalled from memory): the 2^(5-1) fraction E = ABCD, resolution V.
    plan = build_plan("fractional_factorial", factors(5), runs=16, centre_points=0, seed=1)
    assert plan["generators"] == ["E = A:B:C:D"]
    assert plan["resolution"] == 5
    assert plan["alias"]["relation"] == [{"word": "A:B:C:D:E", "sign": 1}]
    info = described(plan)
    assert info.kind == "two_level_fractional_factorial" and info.resolution == 5
    assert info.n_runs == 16


def test_eight_run_seven_factor_fraction_uses_the_published_generators():
    # BHH ch. 6 (recalled from memory): 2^(7-4) resolution III, D=AB, E=AC, F=BC, G=ABC.
    plan = build_plan("fractional_factorial", factors(7), runs=8, centre_points=0, seed=1)
    assert plan["generators"] == ["D = A:B", "E = A:C", "F = B:C", "G = A:B:C"]
    assert plan["resolution"] == 3 and described(plan).resolution == 3
    x = coded_of(plan)
    a, b, c = x[:, 0], x[:, 1], x[:, 2]
    assert_allclose(x[:, 3:], np.column_stack([a * b, a * c, b * c, a * b * c]), atol=0)


def _word_length_pattern(k, gens):
    """Counts of defining words by length 3..k, from the generators' words alone."""
    words = blocking.span([word | 1 << g for g, word, _ in gens])
    lengths = [bin(w).count("1") for w in words]
    return tuple(lengths.count(n) for n in range(3, k + 1))


def _best_pattern(k, runs):
    """Brute force over every choice of generator columns: the minimum aberration pattern."""
    b = runs.bit_length() - 1
    candidates = [m for m in range(1, 2**b) if bin(m).count("1") >= 2]
    best = None
    for combo in combinations(candidates, k - b):
        gens = [(b + i, m, 1) for i, m in enumerate(combo)]
        pattern = _word_length_pattern(k, gens)
        best = pattern if best is None or pattern < best else best
    return best


@pytest.mark.parametrize(("k", "runs"), sorted(fractions.PUBLISHED))
def test_every_published_fraction_has_its_stated_resolution(k, runs):
    # Montgomery Table 8.14 (entered from memory): resolution computed from the columns.
    plan = build_plan("fractional_factorial", factors(k), runs=runs, centre_points=0, seed=3)
    assert plan["resolution"] == fractions.PUBLISHED[(k, runs)][0]
    assert described(plan).resolution == plan["resolution"]
    assert len(plan["runs"]) == runs


@pytest.mark.parametrize(("k", "runs"), [(5, 8), (6, 8), (6, 16), (7, 16), (7, 32), (8, 16),
                                         (8, 32), (9, 32)])
def test_published_fractions_are_minimum_aberration(k, runs):
    # Minimum aberration (Fries & Hunter 1980): no other fraction has a smaller word-length
    # pattern; checked by exhaustive search, independent of the table.
    gens = fractions.published(k, runs)[1]
    assert _word_length_pattern(k, gens) == _best_pattern(k, runs)


def test_two_level_designs_are_orthogonal_in_the_interaction_model():
    # X'X diagonal: every column of a regular resolution V fraction, full factorial with centre
    # points, is orthogonal to every other (BHH ch. 5-6), computed numerically.
    for design, k, runs in (("full_factorial", 3, None), ("fractional_factorial", 5, 16),
                            ("fractional_factorial", 6, 32)):
        x = coded_of(build_plan(design, factors(k), runs=runs, centre_points=0, seed=1))
        m = model_matrix(x, named_model("interaction", k))
        xtx = m.T @ m
        assert_allclose(xtx, np.diag(np.diag(xtx)), atol=1e-12)
        assert_allclose(np.diag(xtx), len(x))


def test_generators_can_be_given_by_name_and_are_checked():
    names = [{"name": n, "low": 1, "high": 2} for n in ("Temp", "Time", "Cat", "Speed")]
    plan = build_plan("fractional_factorial", names, generators=["Speed = -Temp:Time:Cat"],
                      centre_points=0, seed=2)
    assert plan["generators"] == ["Speed = -Temp:Time:Cat"] and len(plan["runs"]) == 8
    assert plan["alias"]["generators"] == [{"word": "Temp:Time:Cat:Speed", "sign": -1}]
    with pytest.raises(PlanError) as err:
        build_plan("fractional_factorial", names, generators=["Speed = Temp"], seed=2)
    assert err.value.field == "generators[0]"
    with pytest.raises(PlanError) as err:
        build_plan("fractional_factorial", factors(5), runs=12, seed=2)
    assert err.value.field == "runs"


# --- blocks ------------------------------------------------------------------------------------

def _best_block_orders(k, n_words):
    best = None
    for combo in combinations(range(1, 2**k), n_words):
        group = blocking.span(list(combo))
        if 0 in group:
            continue
        score = sorted(bin(w).count("1") for w in group)
        best = score if best is None or score > best else best
    return best


@pytest.mark.parametrize(("k", "blocks"), sorted(blocking.FULL_FACTORIAL_BLOCKS))
def test_published_block_arrangements_confound_the_highest_order_effects(k, blocks):
    # Montgomery Table 7.8 (entered from memory): no arrangement confounds higher-order effects.
    words = blocking.block_words(k, blocks, base=list(range(k)), relation=[])
    got = sorted(bin(w).count("1") for w in blocking.span(words))
    if (k, blocks) == (7, 8):
        # 127 choose 3 choices is a large search; no two-factor interaction is confounded
        assert got[0] == 3
        return
    assert got == _best_block_orders(k, blocks.bit_length() - 1)


def test_blocked_factorial_balances_blocks_against_every_factor():
    plan = build_plan("full_factorial", factors(4), blocks=4, centre_points=4, seed=5)
    assert plan["block_effects"] == ["B:D", "A:B:C", "A:C:D"]  # Montgomery Table 7.8 (memory)
    x, b = coded_of(plan), blocks_of(plan)
    assert described(plan).blocks == 4
    for block in range(1, 5):
        part = x[b == block]
        assert len(part) == 5 and np.all(part.sum(axis=0) == 0)  # main effects clear of blocks


def test_half_fraction_in_two_blocks_keeps_main_effects_and_two_factor_interactions_clear():
    plan = build_plan("fractional_factorial", factors(6), runs=32, blocks=2, centre_points=0,
                      seed=1)
    assert all(effect.count(":") >= 2 for effect in plan["block_effects"])


# --- central composite -----------------------------------------------------------------------

@pytest.mark.parametrize(("k", "alpha"), [(2, 1.414), (3, 1.682), (4, 2.0), (5, 2.0)])
def test_rotatable_axial_distance(k, alpha):
    # Montgomery §11.4 (printed to 3 decimals; recalled from memory): alpha = n_F^(1/4);
    # 5 factors with a half-fraction cube, n_F = 16.
    plan = build_plan("central_composite", factors(k), seed=1)
    assert_allclose(plan["axial_distance"]["alpha"], alpha, atol=5e-4)
    info = described(plan)
    assert info.kind == "central_composite" and info.rotatable and info.ccd_type == "circumscribed"
    evaluation = evaluate_plan(plan)
    # rotatable: the prediction variance is the same in every direction at a given radius
    for ring in evaluation["prediction_variance"]["profile"]:
        assert_allclose(ring["min"], ring["max"], rtol=1e-9)


def test_face_centred_and_inscribed_are_recognised():
    face = build_plan("central_composite", factors(3), axial="face_centred", seed=1)
    assert described(face).ccd_type == "face_centred"
    inscribed = build_plan("central_composite", factors(3), axial="inscribed", seed=1)
    info = described(inscribed)
    assert info.ccd_type == "inscribed" and info.rotatable
    assert np.abs(coded_of(inscribed)).max() == pytest.approx(1.0)
    assert inscribed["axial_distance"]["settings"]["A"] == [0.0, 1.0]


def test_orthogonally_blocked_composite_design():
    # Montgomery §11.4.3 (recalled from memory): 2 factors, 3 centre points in each of the two
    # blocks, alpha = 1.414 is both rotatable and orthogonally blocked.
    plan = build_plan("central_composite", factors(2), blocks=2, centre_points=6, seed=1)
    assert_allclose(plan["axial_distance"]["alpha"], np.sqrt(2), rtol=1e-12)
    # orthogonal blocking, checked numerically for 3 factors: the block column is orthogonal to
    # every centred model column
    plan = build_plan("central_composite", factors(3), blocks=2, centre_points=6, seed=1)
    x, b = coded_of(plan), blocks_of(plan)
    m = model_matrix(x, named_model("quadratic", 3))[:, 1:]
    block = np.where(b == 1, 1.0, -1.0)
    assert_allclose((block - block.mean()) @ (m - m.mean(axis=0)), 0, atol=1e-9)
    assert described(plan).blocks == 2


# --- Box–Behnken -----------------------------------------------------------------------------

def test_three_factor_box_behnken_is_the_twelve_edge_midpoints():
    # Box & Behnken (1960): 12 edge midpoints of the cube plus centre points.
    plan = build_plan("box_behnken", factors(3), centre_points=3, seed=1)
    x = coded_of(plan)
    edges = {tuple(r) for r in x if np.any(r)}
    expected = {tuple(r) for r in np.array(np.meshgrid(*[[-1, 0, 1]] * 3)).reshape(3, -1).T
                if np.count_nonzero(r) == 2}
    assert len(edges) == 12 and edges == {tuple(map(float, e)) for e in expected}
    assert len(x) == 15 and described(plan).kind == "box_behnken"


@pytest.mark.parametrize(("k", "points", "centres"),
                         [(3, 12, 3), (4, 24, 3), (5, 40, 6), (6, 48, 6), (7, 56, 6)])
def test_box_behnken_run_counts(k, points, centres):
    # Box & Behnken (1960) table of designs (counts recalled from memory).
    plan = build_plan("box_behnken", factors(k), seed=1)
    assert len(plan["runs"]) == points + centres
    assert described(plan).kind == "box_behnken"
    evaluation = evaluate_plan(plan)
    assert evaluation["inestimable"] == [] and evaluation["residual_df"] > 0


def test_four_factor_box_behnken_blocks_orthogonally_in_three():
    plan = build_plan("box_behnken", factors(4), blocks=3, centre_points=3, seed=1)
    x, b = coded_of(plan), blocks_of(plan)
    for block in (1, 2, 3):
        assert_allclose((x[b == block] ** 2).sum(axis=0), 4.0)


# --- run order, units --------------------------------------------------------------------------

def test_same_seed_same_order_other_seed_other_order():
    first = build_plan("full_factorial", factors(4), seed=11)
    again = build_plan("full_factorial", factors(4), seed=11)
    other = build_plan("full_factorial", factors(4), seed=12)

    def orders(p):
        return [r["standard_order"] for r in p["runs"]]
    assert orders(first) == orders(again)
    assert orders(first) != orders(other)
    assert sorted(orders(first)) == list(range(1, 20))
    drawn = build_plan("full_factorial", factors(2))
    assert isinstance(drawn["seed"], int)
    assert orders(build_plan("full_factorial", factors(2), seed=drawn["seed"])) == orders(drawn)


def test_randomised_within_blocks():
    plan = build_plan("full_factorial", factors(3), blocks=2, replicates=2, seed=4)
    b = blocks_of(plan)
    assert np.all(np.diff(b) >= 0)  # block 1 runs first, then block 2
    assert len(plan["runs"]) == 2 * (8 + 4)


def test_natural_settings_map_back_to_the_same_coded_design():
    plain = build_plan("central_composite", factors(3), seed=9)
    shifted = build_plan("central_composite",
                         [{"name": n, "low": lo, "high": hi, "units": "u"} for n, lo, hi in
                          (("A", 150.0, 190.0), ("B", -3.5, 0.25), ("C", 1e-3, 4e-3))], seed=9)
    assert_allclose(coded_of(plain), coded_of(shifted), atol=0)
    for run in shifted["runs"]:
        for f in shifted["factors"]:
            centre, half = (f["low"] + f["high"]) / 2, (f["high"] - f["low"]) / 2
            assert_allclose((run["settings"][f["name"]] - centre) / half,
                            run["coded"][f["name"]], rtol=1e-12, atol=1e-12)


def test_factor_errors_name_the_field():
    bad = factors(3)
    bad[2] = {"name": "C", "low": 5, "high": 1}
    with pytest.raises(PlanError) as err:
        build_plan("full_factorial", bad, seed=1)
    assert err.value.field == "factors[2].low"
    with pytest.raises(PlanError) as err:
        build_plan("full_factorial", factors(2) + [{"name": "A", "low": 0, "high": 1}], seed=1)
    assert err.value.field == "factors[2].name"
    with pytest.raises(PlanError) as err:
        build_plan("central_composite", factors(3), axial="sideways", seed=1)
    assert err.value.field == "axial"


# --- evaluation ---------------------------------------------------------------------------

def test_power_against_the_noncentral_t():
    plan = build_plan("full_factorial", factors(3), centre_points=4, seed=1)
    got = evaluate_plan(plan, "interaction", effect=3.0, sigma=2.0, alpha=0.05)
    n, p = 12, 7
    assert got["residual_df"] == n - p
    # each coefficient's SE is sigma / sqrt(8) (8 cube points at ±1); the coefficient is
    # effect / 2. Two-sided t test, noncentral t computed directly with scipy.stats.nct.
    delta = (3.0 / 2) / (2.0 / np.sqrt(8))
    t = stats.t.isf(0.025, n - p)
    expected = stats.nct.sf(t, n - p, delta) + stats.nct.cdf(-t, n - p, delta)
    assert_allclose(got["power"]["per_term"]["A"], expected, rtol=1e-7)
    assert_allclose(got["power"]["per_term"]["A:B"], expected, rtol=1e-7)


def test_power_is_none_without_residual_df_and_aliased_terms_are_named():
    plan = build_plan("fractional_factorial", factors(7), runs=8, centre_points=0, seed=1)
    got = evaluate_plan(plan, "interaction", effect=1.0, sigma=1.0)
    assert got["residual_df"] == 0
    assert all(v is None for v in got["power"]["per_term"].values())
    lost = {item["term"]: item["aliased_with"] for item in got["inestimable"]}
    assert lost["A:B"] == ["D"] and lost["F:G"] == ["A"]  # BHH 2^(7-4) alias table (memory)
    assert any("No residual degrees of freedom" in note for note in got["notes"])


def test_vif_and_leverage_against_statsmodels():
    plan = build_plan("central_composite", factors(3), axial="face_centred", centre_points=3,
                      seed=1)
    got = evaluate_plan(plan, "quadratic")
    m = model_matrix(coded_of(plan), named_model("quadratic", 3))
    names = ["A", "B", "C", "A:B", "A:C", "B:C", "A^2", "B^2", "C^2"]
    for j, name in enumerate(names, start=1):
        assert_allclose(got["vif"][name], variance_inflation_factor(m, j), rtol=1e-9)
    hat = m @ np.linalg.pinv(m)
    assert_allclose([r["leverage"] for r in got["leverage"]["per_run"]], np.diag(hat),
                    rtol=1e-9)
    assert_allclose(got["leverage"]["mean"], 10 / 17, rtol=1e-12)


def test_prediction_variance_at_the_centre_of_a_factorial():
    # N x'(X'X)^-1 x at the centre of an orthogonal two-level design is 1 (only the intercept).
    plan = build_plan("full_factorial", factors(3), centre_points=0, seed=1)
    got = evaluate_plan(plan, "linear")["prediction_variance"]
    assert got["profile"][0]["radius"] == 0 and got["profile"][0]["mean"] == pytest.approx(1.0)
    # at a corner: 1 + 3 (each coded main effect contributes x^2 = 1)
    assert got["max"] <= 4.0 + 1e-9 and got["region"] == "cube"


@pytest.mark.parametrize("design", ["full_factorial", "fractional_factorial",
                                    "central_composite", "box_behnken"])
def test_plan_and_evaluation_are_plain_json(design):
    import json
    plan = build_plan(design, factors(5), seed=8)
    assert json.loads(json.dumps(plan)) == plan
    evaluation = evaluate_plan(json.loads(json.dumps(plan)), effect=1.0, sigma=0.5)
    assert json.loads(json.dumps(evaluation)) == evaluation
    assert evaluation["model"] == ("quadratic" if design in ("central_composite", "box_behnken")
                                   else "linear")


def test_a_design_crossed_with_a_categorical_factor_runs_whole_at_each_level():
    """Every level gets the whole face-centred design (9 points + 2 centre runs), in one
    randomised order; the evaluation fits the levels as fixed effects."""
    from app.analysis.plans import build_plan, evaluate_plan

    factors = [{"name": "Temp", "low": 150, "high": 170}, {"name": "Time", "low": 20, "high": 30},
               {"name": "Supplier", "levels": ["Birch", "Alder", "Cedar"]}]
    plan = build_plan("central_composite", factors, axial="face_centred", centre_points=2,
                      seed=4)
    runs = plan["runs"]
    assert len(runs) == 3 * 10
    for level in ("Birch", "Alder", "Cedar"):
        at = sorted((r["coded"]["Temp"], r["coded"]["Time"]) for r in runs
                    if r["settings"]["Supplier"] == level)
        assert at == sorted((r["coded"]["Temp"], r["coded"]["Time"]) for r in runs
                            if r["settings"]["Supplier"] == "Birch")
        assert len(at) == 10
    suppliers = [r["settings"]["Supplier"] for r in sorted(runs, key=lambda r: r["run_order"])]
    assert suppliers != sorted(suppliers)  # not run supplier by supplier
    assert build_plan("central_composite", factors, axial="face_centred", centre_points=2,
                      seed=4)["runs"] == runs
    evaluation = evaluate_plan(plan)
    # 30 runs - (intercept + 2 level effects + 5 quadratic terms in Temp and Time) = 22.
    assert evaluation["residual_df"] == 22 and "fixed effect" in evaluation["notes"][0]


@pytest.mark.parametrize(("levels", "field"), [
    (["Birch"], "factors[2].levels"), (["Birch", "Birch"], "factors[2].levels"),
    (["Birch", ""], "factors[2].levels"), ("Birch,Alder", "factors[2].levels")])
def test_categorical_levels_are_checked(levels, field):
    from app.analysis.plans import PlanError, build_plan

    with pytest.raises(PlanError) as refused:
        build_plan("full_factorial", [{"name": "A", "low": 0, "high": 1},
                                      {"name": "B", "low": 0, "high": 1},
                                      {"name": "S", "levels": levels}])
    assert refused.value.field == field


def test_a_categorical_factor_named_like_another_is_refused_naming_it():
    from app.analysis.plans import PlanError, build_plan

    with pytest.raises(PlanError) as refused:
        build_plan("full_factorial", [{"name": "A", "low": 0, "high": 1},
                                      {"name": "B", "low": 0, "high": 1},
                                      {"name": "A", "levels": ["x", "y"]}])
    assert refused.value.field == "factors[2].name"
