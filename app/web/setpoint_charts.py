"""The design-space map as a Vega-Lite spec (Altair), drawn by static/js/setpoints.js."""

from __future__ import annotations

from typing import Any

import altair as alt

from app.web.charts import POINT

INSIDE = "#8dbaa6"      # our palette: sage for settings whose PI stays inside every limit
OUTSIDE = "#e9e4d6"     # pale sand for the rest of the design region
SETPOINT = "#d9480f"
SIDE = 380
INSIDE_LABEL, OUTSIDE_LABEL = "PI inside all limits", "PI outside a limit"


def design_space_chart(space: dict[str, Any], settings: dict[str, float],
                       points: int = 41) -> dict[str, Any]:
    """Grid cells coloured by ``inside``, the design points and the proposed setpoint.

    ``space`` is the output of :func:`app.analysis.optimize.design_space`; ``settings`` the
    proposal's actual settings (the setpoint drawn is its projection on the two factors).
    """
    x_name, y_name = space["x_factor"], space["y_factor"]
    cells = [{"x": p["x"], "y": p["y"],
              "status": INSIDE_LABEL if p["inside"] else OUTSIDE_LABEL} for p in space["points"]]
    # One square per grid cell: ``points`` cells per axis across the plot.
    size = (SIDE / points) ** 2
    x = alt.X("x:Q", title=x_name, scale=alt.Scale(zero=False))
    y = alt.Y("y:Q", title=y_name, scale=alt.Scale(zero=False))
    grid = (alt.Chart(alt.Data(values=cells)).mark_square(size=size, opacity=1.0)
            .encode(x=x, y=y,
                    color=alt.Color("status:N", title="Design space",
                                    scale=alt.Scale(domain=[INSIDE_LABEL, OUTSIDE_LABEL],
                                                    range=[INSIDE, OUTSIDE]))))
    runs = (alt.Chart(alt.Data(values=[{"x": p["x"], "y": p["y"], "row": p["row"]}
                                       for p in space["design_points"]]))
            .mark_point(shape="circle", filled=False, color=POINT, size=60, strokeWidth=1.5)
            .encode(x="x:Q", y="y:Q", tooltip=[alt.Tooltip("row:O", title="Design run (row)")]))
    point = (alt.Chart(alt.Data(values=[{"x": settings[x_name], "y": settings[y_name],
                                         "label": "proposed setpoint"}]))
             .mark_point(shape="cross", filled=True, color=SETPOINT, size=260)
             .encode(x="x:Q", y="y:Q", tooltip=[alt.Tooltip("label:N", title="")]))
    chart = alt.layer(grid, runs, point).properties(width=SIDE, height=SIDE)
    return chart.to_dict()
