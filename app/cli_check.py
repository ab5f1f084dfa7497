"""``plumbline check``: fit a model to a data file and print every residual check.

The file goes through the same reading and validation as an upload (app.ingest). Column names
are only ever used to look columns up; nothing is handed to a formula parser, so names such as
``C``, ``I`` or ``Feed rate`` work. Exit status 0 when the analysis ran, 2 for bad input.
"""

from __future__ import annotations

import gc
import json
import sys
from pathlib import Path

import click

# Only the light spec module here: the engine and its libraries load when the command runs, so
# `plumbline --help` and `plumbline audit verify` start without them (tests/test_cli.py).
from app.analysis.spec import (
    NAMED_MODELS,
    TRANSFORMS,
    AnalysisError,
    FitSpec,
    Thresholds,
)


def _names(text: str | None) -> list[str]:
    return [part.strip() for part in text.split(",") if part.strip()] if text else []


def parse_levels(text: str | None) -> dict[str, tuple[float, float]]:
    """``"A=lo:hi,B=lo:hi"`` to {name: (lo, hi)}; the name may contain spaces."""
    out: dict[str, tuple[float, float]] = {}
    for item in _names(text):
        name, sep, rng = item.rpartition("=")
        lo, sep2, hi = rng.partition(":")
        try:
            if not sep or not sep2 or not name.strip():
                raise ValueError
            out[name.strip()] = (float(lo), float(hi))
        except ValueError as err:
            raise click.UsageError(f"--levels item '{item}' must look like NAME=low:high") from err
    return out


def parse_exclusions(items: tuple[str, ...]) -> tuple[tuple[int, str], ...]:
    """``ROW=reason`` items to (row, reason) pairs; a reason is required."""
    out = []
    for item in items:
        row, sep, reason = item.partition("=")
        if not sep or not row.strip().isdigit() or not reason.strip():
            raise click.UsageError(
                f"--exclude '{item}' must look like ROW=reason (reason required)"
            )
        out.append((int(row), reason.strip()))
    return tuple(out)


def parse_thresholds(text: str | None) -> Thresholds:
    if not text:
        return Thresholds()
    values: dict[str, float] = {}
    for item in _names(text):
        key, sep, val = item.partition("=")
        if key.strip() not in ("review", "fail") or not sep:
            raise click.UsageError(f"--thresholds item '{item}' must be review=P or fail=P")
        try:
            values[key.strip()] = float(val)
        except ValueError as err:
            raise click.UsageError(f"--thresholds value '{val}' is not a number") from err
    return Thresholds(**values)


def parse_terms(text: str | None) -> tuple[str, ...] | None:
    """Terms separated by spaces, or by commas when a factor name itself has a space."""
    if text is None:
        return None
    parts = text.split(",") if "," in text else text.split()
    terms = tuple(p.strip() for p in parts if p.strip())
    if not terms:
        raise click.UsageError("--terms needs at least one term")
    return terms


def build_roles(raw, suggested: dict, *, response: str, factors: list[str], run_order: str | None,
                block: str | None, covariates: list[str], coded: bool,
                levels: dict[str, tuple[float, float]]) -> dict:
    """Start from the suggested roles and apply the command-line choices."""
    from app.ingest import ColumnRole

    columns = list(raw.frame.columns)
    for name, where in ([(response, "--response")] + [(f, "--factors") for f in factors]
                        + [(run_order, "--run-order"), (block, "--block")]
                        + [(c, "--covariates") for c in covariates]):
        if name is not None and name not in columns:
            raise click.UsageError(f"Column '{name}' (given in {where}) is not in the file; "
                                   f"columns: {', '.join(columns)}")
    for name in levels:
        if name not in columns:
            raise click.UsageError(f"Column '{name}' (given in --levels) is not in the file")
    if not factors:
        factors = [c for c, r in suggested.items() if r.role == "factor" and c != response]
    if not covariates:
        covariates = [c for c, r in suggested.items()
                      if r.role == "covariate" and c not in (response, run_order, block, *factors)]
    roles = {}
    for name, role in suggested.items():
        replaced = (role.role in ("response", "factor", "covariate")
                    or (role.role == "run_order" and run_order is not None)
                    or (role.role == "block" and block is not None))
        roles[name] = ColumnRole("ignore", units=role.units) if replaced else role
    if run_order is not None:
        roles[run_order] = ColumnRole("run_order")
    if block is not None:
        roles[block] = ColumnRole("block")
    roles[response] = ColumnRole("response", units=suggested[response].units)
    for name in factors:
        units = suggested[name].units
        if name in levels:
            lo, hi = levels[name]
            roles[name] = ColumnRole("factor", units=units, low=lo, high=hi)
        elif suggested[name].categorical_factor:
            roles[name] = suggested[name]  # a text column of few names: its levels are names
        elif coded:
            roles[name] = ColumnRole("factor", units=units)
        else:
            roles[name] = ColumnRole("factor", units=units, low=suggested[name].low,
                                     high=suggested[name].high)
            if suggested[name].low is None:
                roles[name] = _levels_from_data(raw, name, units)
    for name in covariates:
        roles[name] = ColumnRole("covariate", units=suggested[name].units)
    return roles


def _levels_from_data(raw, name: str, units: str | None):
    import numpy as np

    from app.ingest import ColumnRole
    from app.ingest.roles import suggest_levels

    numbers = raw.numbers(name)
    values = numbers[~np.isnan(numbers)].tolist()
    if len(set(values)) < 2:
        return ColumnRole("factor", units=units)  # validation reports the constant column
    lo, hi = suggest_levels(values)
    return ColumnRole("factor", units=units, low=lo, high=hi)


@click.command("check")
@click.argument("file", type=click.Path(dir_okay=False, path_type=Path))
@click.option("--response", required=True, help="Response column.")
@click.option("--factors", help="Factor columns, comma-separated (default: the suggested ones).")
@click.option("--run-order", "run_order", help="Run-order column.")
@click.option("--block", help="Block column (fitted as a fixed term).")
@click.option("--covariates",
              help="Recorded variables to check residuals against, comma-separated.")
@click.option("--model", type=click.Choice(NAMED_MODELS), help="Named model (default linear).")
@click.option("--terms", help='Explicit terms, e.g. "A B A:B A^2" (commas if names have spaces).')
@click.option("--coded", is_flag=True, help="Factor columns already hold coded values.")
@click.option("--levels", help="Declared levels, e.g. Temp=150:190,Time=10:30.")
@click.option("--exclude", multiple=True, help="ROW=reason; repeat for more rows.")
@click.option("--transform", type=click.Choice(TRANSFORMS), default="none", show_default=True)
@click.option("--thresholds", help="review=0.05,fail=0.01")
@click.option("--sheet", help="Worksheet of an xlsx file (default: the first).")
@click.option("--goal", help="Search the design region: maximize, minimize or target=VALUE.")
@click.option("--json", "as_json", is_flag=True, help="Print the full result document as JSON.")
def check_command(file: Path, response: str, factors: str | None, run_order: str | None,
                  block: str | None, covariates: str | None, model: str | None, terms: str | None,
                  coded: bool, levels: str | None, exclude: tuple[str, ...], transform: str,
                  thresholds: str | None, sheet: str | None, goal: str | None,
                  as_json: bool) -> None:
    """Fit a model to FILE (csv or xlsx) and report every residual check."""
    _load_engine()
    # What the imports built outlives the command, so the cyclic collector need not walk it
    # again each time reading a large file triggers a collection (about 0.4 s of 2.5 s at
    # 100,000 runs). Undone after: the command may run inside another process (tests, scripts).
    gc.freeze()
    try:
        _check(file, response, factors, run_order, block, covariates, model, terms, coded,
               levels, exclude, transform, thresholds, sheet, goal, as_json)
    finally:
        gc.unfreeze()


def _load_engine() -> None:
    """Import the engine and the readers (before the freeze) with the cyclic collector paused.

    Almost everything numpy, pandas and scipy build while importing lives as long as the
    process, so the collections their allocations trigger meanwhile take time (some 30 ms at
    start-up) and free next to nothing. What little they would have freed is frozen with the
    rest and left to the collector once the command unfreezes.
    """
    enabled = gc.isenabled()
    gc.disable()
    try:
        import app.analysis.engine  # noqa: F401
        import app.ingest  # noqa: F401
    finally:
        if enabled:
            gc.enable()


def _check(file: Path, response: str, factors: str | None, run_order: str | None,
           block: str | None, covariates: str | None, model: str | None, terms: str | None,
           coded: bool, levels: str | None, exclude: tuple[str, ...], transform: str,
           thresholds: str | None, sheet: str | None, goal: str | None,
           as_json: bool) -> None:
    from app.analysis import analyse, summary_text
    from app.ingest import IngestError, read_upload, suggest_roles, validate

    if model and terms:
        raise click.UsageError("Give --model or --terms, not both")
    if coded and levels:
        raise click.UsageError("Give --coded or --levels, not both")
    try:
        data = file.read_bytes()
    except OSError as err:
        _fail(f"Cannot read '{file}': {err.strerror or err}")
    try:
        raw = read_upload(data, file.name, sheet)
        roles = build_roles(raw, suggest_roles(raw), response=response, factors=_names(factors),
                            run_order=run_order, block=block, covariates=_names(covariates),
                            coded=coded, levels=parse_levels(levels))
        table = validate(raw, roles)
        spec = FitSpec(
            response=response,
            factors=table.analysis_factors(),
            run_order=table.run_order, block=table.block,
            covariates=tuple((c, table.roles[c].kind or "numeric") for c in table.covariates),
            label=table.label, model=None if terms else (model or "linear"),
            terms=parse_terms(terms), transform=transform,
            exclusions=parse_exclusions(exclude), thresholds=parse_thresholds(thresholds),
        )
        result = analyse(table.frame, spec)
        # The whole document (every run as an object) only when it is printed or searched.
        document = result.to_dict() if as_json or goal else {}
        search = None
        if goal:
            from app.analysis.optimize import single_goal

            search = single_goal(document, goal)
    except (IngestError, AnalysisError) as err:
        _fail(str(err))
    if search is not None:
        document["optimum"] = search["optimum"]
        document["stationary_point"] = search["stationary_point"]
        document["setpoint_region"] = search["region"]
        document["setpoint_check"] = search.get("check")
        document["setpoint_caution"] = search.get("caution")
        document["setpoint_levels"] = search.get("levels")
        document["setpoint_edge"] = search.get("edge")
    if as_json:
        click.echo(json.dumps(document, sort_keys=True, indent=2))
        return
    click.echo(f"File: {file.name}")
    click.echo(summary_text(result), nl=False)
    if search is not None:
        click.echo(_search_text(goal, search))


def _search_text(goal: str, search: dict) -> str:
    opt = search["optimum"]
    lines = ["", f"Setting search ({goal}) inside the design region",
             "  " + search["region"]["why"]]
    for name, value in opt["settings"].items():
        if isinstance(value, str):
            lines.append(f"  {name:<24} {value}   (level)")
        else:
            lines.append(f"  {name:<24} {value:.6g}   (coded {opt['coded'][name]:+.3f})")
    lines.append(f"  predicted {opt['predicted']:.6g}   95% CI [{opt['ci'][0]:.6g}, "
                 f"{opt['ci'][1]:.6g}]   95% PI [{opt['pi'][0]:.6g}, {opt['pi'][1]:.6g}]")
    if search.get("levels"):
        lines.append("  " + search["levels"]["statement"])
        for item in search["levels"]["by_level"]:
            named = ", ".join(f"{n} = {v}" for n, v in item["levels"].items())
            lines.append(f"    {named:<28} predicted {item['predicted'][search['response']]:.6g}"
                         + ("   (proposed)" if item["chosen"] else ""))
    if search.get("edge"):
        lines.append("  " + search["edge"]["note"])
    if search.get("check"):
        lines.append(f"  check: {search['check']['status']}. {search['check']['statement']}")
    sp = search.get("stationary_point")
    if sp:
        eig = ", ".join(f"{e:.4g}" for e in sp["eigenvalues"])
        lines.append(f"  stationary point: {sp['kind']} (eigenvalues {eig}), predicted "
                     f"{sp['predicted']:.6g}")
    if search.get("caution"):
        lines.append("  CAUTION: " + search["caution"])
    return "\n".join(lines)


def _fail(message: str) -> None:
    click.echo(f"Error: {message}", err=True)
    sys.exit(2)
