"""Every refusal names the field: region, bounds, fixed values, goals, fits, design space."""

import pytest

from app.analysis.optimize import OutsideRegion, SetpointError, design_space, propose, single_goal
from app.analysis.optimize.region import build_region

from .fits import ROTATABLE_2, hand_model

LEVELS = {"A": (150.0, 170.0), "B": (2.0, 3.0)}
GOAL = {"Y": {"goal": "maximize", "lower": 0, "upper": 20}}


def cube_doc(**kw):
    return hand_model({"A": 2.0, "B": 1.0}, 10.0, levels=LEVELS, **kw)


def refused(error, field, call, *args, **kwargs):
    with pytest.raises(error) as info:
        call(*args, **kwargs)
    assert info.value.field == field, str(info.value)
    return str(info.value)


def test_bound_leaving_the_cube_names_the_factor():
    msg = refused(OutsideRegion, "A", propose, {"Y": cube_doc()}, GOAL, bounds={"A": [140, 165]})
    assert "'A'" in msg and "design region" in msg


def test_fixed_value_leaving_the_sphere_names_the_factor():
    doc = hand_model({"A": 2.0, "B": 1.0}, 10.0, design=ROTATABLE_2)
    msg = refused(OutsideRegion, "B", single_goal, doc, "maximize", fixed={"B": 1.5})
    assert "'B'" in msg


def test_bounds_with_fixed_values_outside_the_sphere_are_refused():
    doc = hand_model({"A": 2.0, "B": 1.0}, 10.0, design=ROTATABLE_2)
    # A >= 1.2 with B fixed at 1.0: nearest point has radius sqrt(2.44) > sqrt(2)
    msg = refused(OutsideRegion, "A", propose, {"Y": doc}, GOAL, bounds={"A": [1.2, None]},
                  fixed={"B": 1.0})
    assert "no setting inside" in msg


def test_other_bound_and_fixed_errors():
    refused(SetpointError, "C", propose, {"Y": cube_doc()}, GOAL, bounds={"C": [0, 1]})
    refused(SetpointError, "A", propose, {"Y": cube_doc()}, GOAL, bounds={"A": [165, 155]})
    refused(SetpointError, "A", propose, {"Y": cube_doc()}, GOAL, bounds={"A": "wide"})
    refused(SetpointError, "A", propose, {"Y": cube_doc()}, GOAL, fixed={"A": "hot"})
    refused(OutsideRegion, "A", propose, {"Y": cube_doc()}, GOAL, bounds={"A": [150, 155]},
            fixed={"A": 160})
    refused(SetpointError, "fixed", propose, {"Y": cube_doc()}, GOAL, fixed=[160])


def test_point_outside_the_region_names_the_factor():
    region = build_region(cube_doc()["model"]["factors"], "cube", None, bounds={"B": [2.0, 2.6]})
    assert region.inside({"A": 0.0, "B": 0.0}) and not region.inside({"A": 0.0, "B": 0.5})
    msg = refused(OutsideRegion, "B", region.require_inside, {"A": 0.0, "B": 0.5}, "Setpoint")
    assert "2.75" in msg   # the actual value 2.5 + 0.5 * 0.5, named with the factor
    sphere = build_region(cube_doc()["model"]["factors"], "sphere", 1.2)
    refused(OutsideRegion, "A", sphere.require_inside, [1.0, 0.9])


def test_goal_refusals_name_the_response_and_field():
    doc = {"Y": cube_doc()}
    refused(SetpointError, "goals", propose, doc, {})
    refused(SetpointError, "goals", propose, doc, {"Z": {"goal": "maximize"}})
    msg = refused(SetpointError, "goal", propose, doc, {"Y": {"goal": "most"}})
    assert "'Y'" in msg
    refused(SetpointError, "weight", propose, doc,
            {"Y": {"goal": "maximize", "lower": 0, "upper": 1, "weight": -1}})
    refused(SetpointError, "goal", single_goal, cube_doc(), "biggest")
    refused(SetpointError, "goal", single_goal, cube_doc(), "target=lots")
    # the earlier word for a range goal is refused with its new name
    assert "'within'" in refused(SetpointError, "goal", single_goal, cube_doc(), "in_range")
    msg = refused(SetpointError, "importance", propose, doc,
                  {"Y": {"goal": "maximize", "importance": 2}})
    assert "'weight'" in msg
    refused(SetpointError, "goals", propose, doc, {"Y": {"goal": "within", "lower": 0}})


def test_fits_must_share_factors_and_coding():
    other_levels = hand_model({"A": 1.0, "B": 1.0}, 0.0, response="Z",
                              levels={"A": (150.0, 180.0), "B": (2.0, 3.0)})
    msg = refused(SetpointError, "factors", propose, {"Y": cube_doc(), "Z": other_levels}, GOAL)
    assert "'Z'" in msg and "'Y'" in msg
    other_names = hand_model({"A": 1.0, "C": 1.0}, 0.0, names=("A", "C"), response="Z",
                             levels={"A": LEVELS["A"], "C": (0.0, 1.0)})
    refused(SetpointError, "factors", propose, {"Y": cube_doc(), "Z": other_names}, GOAL)
    refused(SetpointError, "fits", propose, {"Z": cube_doc()}, {"Z": GOAL["Y"]})
    refused(SetpointError, "fits", propose, {}, GOAL)
    refused(SetpointError, "fits", propose, {"Y": {"response": "Y"}}, GOAL)


def test_design_space_refusals():
    doc = {"Y": cube_doc()}
    spec = {"Y": {"lower": 9}}
    refused(SetpointError, "x_factor", design_space, doc, spec, "Q", "B")
    refused(SetpointError, "y_factor", design_space, doc, spec, "A", "A")
    refused(SetpointError, "specs", design_space, doc, {}, "A", "B")
    refused(SetpointError, "specs", design_space, doc, {"Z": {"lower": 1}}, "A", "B")
    refused(SetpointError, "lower", design_space, doc, {"Y": {}}, "A", "B")
    refused(SetpointError, "lower", design_space, doc, {"Y": {"lower": 5, "upper": 4}}, "A", "B")
    refused(SetpointError, "low", design_space, doc, {"Y": {"low": 5}}, "A", "B")
    refused(SetpointError, "A", design_space, doc, spec, "A", "B", fixed={"A": 160})
    saturated = cube_doc()
    saturated["model"]["s"], saturated["model"]["df_resid"] = None, 0
    refused(SetpointError, "df_resid", design_space, {"Y": saturated}, spec, "A", "B")
