"""A readable plain-text summary of a fit, for the command line."""

from __future__ import annotations

from .results import FitResult


def _num(v, fmt: str = ".4g") -> str:
    return "-" if v is None or v != v else format(v, fmt)


def summary_text(result: FitResult) -> str:
    """Design, model, coefficient table, ANOVA, fit statistics, then each check's verdict."""
    d = result.design
    lines = [f"Response: {result.response}   transform: {result.transform['label']}",
             f"Design: {d.kind.replace('_', ' ')}  ({d.n_runs} runs used, {d.n_centre} centre, "
             f"pure-error df {d.pure_error_df})"]
    if d.alpha is not None:
        lines[-1] += f", alpha = {d.alpha:.4g} ({d.ccd_type})"
    lines.append(f"Terms: {' '.join(result.terms) or '(intercept only)'}")
    lines += ["", "Coefficients (coded units)",
              f"  {'term':<24}{'estimate':>12}{'std error':>12}{'t':>9}{'p':>10}{'VIF':>7}"]
    for c in result.coefficients:
        lines.append(f"  {c.term:<24}{_num(c.estimate):>12}{_num(c.std_error):>12}"
                     f"{_num(c.t_value, '.3g'):>9}{_num(c.p_value, '.3g'):>10}"
                     f"{_num(c.vif, '.3g'):>7}")
    lines += ["", f"ANOVA ({result.anova_method})",
              f"  {'source':<24}{'df':>5}{'sum sq':>13}{'mean sq':>13}{'F':>10}{'p':>10}"]
    for r in result.anova:
        lines.append(f"  {r['source']:<24}{r['df']:>5}"
                     f"{_num(r['sum_sq']):>13}{_num(r['mean_sq']):>13}"
                     f"{_num(r['f_value'], '.3g'):>10}{_num(r['p_value'], '.3g'):>10}")
    f = result.fit
    lines += ["", f"R² {_num(f['r_squared'])}   adjusted R² {_num(f['adj_r_squared'])}   "
                  f"predicted R² {_num(f['pred_r_squared'])}   residual SD {_num(f['s'])}",
              "", "Equation (natural units): " + result.equation["actual"]]
    if result.effects and result.lenth:
        lz = result.lenth
        lines += ["", f"Effects (Lenth PSE {_num(lz['pse'])}, ME {_num(lz['me'])}, "
                      f"SME {_num(lz['sme'])})"]
        lines += [f"  {e.term:<24}{_num(e.effect):>12}" for e in result.effects]
    lines += ["", "Residual checks"]
    cal = result.calibration
    if cal.get("family"):
        lines.append(f"  Verdicts follow p adjusted across {len(cal['family'])} checks "
                     f"({cal['adjustment']}); this controls {cal['controls']}.")
    for c in result.checks:
        stat = ("" if c.p_value is None else
                f" (p = {_num(c.p_value, '.3g')}, adjusted {_num(c.p_adjusted, '.3g')})")
        lines.append(f"  [{c.verdict.upper():^14}] {c.id}{stat}")
        lines.append(f"  {'':16} {c.message}")
        if c.runs:
            lines.append(f"  {'':16} rows: {', '.join(str(r) for r in c.runs)}")
    if result.suggestions:
        lines += ["", "Suggestions"] + [f"  - {s}" for s in result.suggestions]
    return "\n".join(lines) + "\n"
