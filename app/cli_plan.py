"""``plumbline plan``: build and evaluate a design and write its run sheet, without a server.

The same engine and run sheet as a plan made in a study (app.analysis.plans,
app.workflow.plans); nothing is stored. Exit status 0 when the sheet was written, 2 for a
request the design cannot take (the message names the field).
"""

from __future__ import annotations

import json
import sys
from pathlib import Path

import click

DESIGNS = ("full_factorial", "fractional_factorial", "central_composite", "box_behnken")
AXIAL = ("rotatable", "face_centred", "inscribed", "orthogonal")


def parse_factor(text: str) -> dict:
    """``"Name=low:high"`` or ``"Name=low:high:units"`` (the name may contain spaces)."""
    name, sep, rest = text.rpartition("=")
    parts = rest.split(":")
    if not sep or not name.strip() or len(parts) not in (2, 3):
        raise click.BadParameter(f"'{text}': write a factor as NAME=LOW:HIGH or "
                                 "NAME=LOW:HIGH:UNITS", param_hint="--factor")
    try:
        low, high = float(parts[0]), float(parts[1])
    except ValueError:
        raise click.BadParameter(f"'{text}': LOW and HIGH must be numbers",
                                 param_hint="--factor") from None
    return {"name": name.strip(), "low": low, "high": high,
            "units": parts[2].strip() if len(parts) == 3 else None}


@click.command(help="Build a design, evaluate it and write its randomised run sheet (CSV).")
@click.option("--design", type=click.Choice(DESIGNS), required=True)
@click.option("--factor", "factors", multiple=True, required=True,
              help="NAME=LOW:HIGH[:UNITS] in natural units; repeat for each factor.")
@click.option("--runs", type=int, help="Fractional factorials: the number of factorial runs.")
@click.option("--centre-points", type=int)
@click.option("--axial", type=click.Choice(AXIAL), help="Central composite designs.")
@click.option("--blocks", type=int)
@click.option("--replicates", type=int, default=1, show_default=True)
@click.option("--seed", type=int, help="Seed of the random run order (drawn when omitted).")
@click.option("--response", "responses", multiple=True,
              help="A blank response column of the sheet; repeat for more.")
@click.option("--out", type=click.Path(dir_okay=False, path_type=Path),
              help="Write the sheet here (standard output when omitted).")
@click.option("--json", "as_json", type=click.Path(dir_okay=False, path_type=Path),
              help="Also write the whole plan and its evaluation as JSON.")
def plan_command(design, factors, runs, centre_points, axial, blocks, replicates, seed,
                 responses, out, as_json) -> None:
    from app.analysis import plans as engine
    from app.workflow.plans import DEFAULT_RESPONSE, sheet_table, table_csv

    options = {k: v for k, v in (("runs", runs), ("centre_points", centre_points),
                                 ("axial", axial), ("blocks", blocks), ("seed", seed))
               if v is not None}
    try:
        built = engine.build_plan(design, [parse_factor(f) for f in factors],
                                  replicates=replicates, **options)
        evaluation = engine.evaluate_plan(built)
    except engine.PlanError as exc:
        field = getattr(exc, "field", None)
        click.echo(f"error: {exc}" + (f" (field: {field})" if field else ""), err=True)
        sys.exit(2)
    sheet = table_csv(*sheet_table(built, list(responses) or [DEFAULT_RESPONSE]))
    if out is None:
        click.echo(sheet, nl=False)
    else:
        out.write_text(sheet, encoding="utf-8")
        click.echo(f"{len(built['runs'])} runs in random order (seed {built['seed']}) "
                   f"written to {out}", err=True)
    if as_json is not None:
        as_json.write_text(json.dumps({"plan": built, "evaluation": evaluation}, indent=2,
                                      ensure_ascii=False), encoding="utf-8")
