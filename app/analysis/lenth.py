"""Lenth's pseudo standard error and margins, and half-normal plot data.

Lenth (1989), "Quick and easy analysis of unreplicated factorials", Technometrics 31(4), 469–473,
for m effects c_1..c_m:
  s0  = 1.5 median |c|
  PSE = 1.5 median {|c| : |c| < 2.5 s0}
  ME  = t(0.975; d) PSE  and  SME = t(gamma; d) PSE,  gamma = (1 + 0.95^(1/m)) / 2,  d = m / 3.
The effects must be every contrast the two-level part of the design estimates (see
``effects.two_level_contrasts``), not a model's chosen terms: the median is taken as a noise
estimate only because most of those contrasts are inactive. Verified against the filtration-rate
2^4 example (PSE = 2.625, recalled from memory) and a numpy Hadamard recomputation in
tests/analysis/test_lenth_contrasts.py.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import special

# Lenth (1989): the 1.5 makes 1.5 median|c| consistent for sigma of normal effects
# (median |Z| = 0.6745 ≈ 1 / 1.5), 2.5 s0 trims the likely-active effects, and m/3 is the df of
# the t reference distribution he fitted by simulation.
PSE_FACTOR = 1.5
TRIM_MULTIPLE = 2.5
DF_PER_EFFECT = 1.0 / 3.0


@dataclass(frozen=True)
class LenthResult:
    pse: float
    me: float
    sme: float
    df: float
    s0: float
    m: int

    def to_dict(self) -> dict:
        return {"pse": self.pse, "me": self.me, "sme": self.sme, "df": self.df, "s0": self.s0,
                "m": self.m}


def lenth(effects: np.ndarray, level: float = 0.95, negligible: float = 0.0) -> LenthResult:
    """Lenth's PSE, margin of error ME and simultaneous margin SME for ``effects``.

    Effects with |c| <= ``negligible`` (rounding noise) count as exactly zero: they stay among
    the m effects but cannot carry rounding junk into the medians.
    """
    c = np.abs(np.asarray(effects, dtype=float))
    c = np.where(c <= negligible, 0.0, c)
    m = len(c)
    if m < 2:
        raise ValueError("Lenth's method needs at least two effects")
    s0 = PSE_FACTOR * float(np.median(c))
    trimmed = c[c < TRIM_MULTIPLE * s0]
    pse = PSE_FACTOR * float(np.median(trimmed)) if len(trimmed) else 0.0
    df = m * DF_PER_EFFECT
    me = float(special.stdtrit(df, 0.5 + level / 2.0)) * pse
    gamma = (1.0 + level ** (1.0 / m)) / 2.0
    sme = float(special.stdtrit(df, gamma)) * pse
    return LenthResult(pse=pse, me=me, sme=sme, df=df, s0=s0, m=m)


def half_normal_points(names: list[str], effects: np.ndarray,
                       in_model: list[bool] | None = None) -> list[dict]:
    """|effect| sorted ascending with half-normal quantiles Phi^-1(0.5 + 0.5 (i - 0.5) / m)."""
    order = np.argsort(np.abs(effects), kind="stable")
    m = len(effects)
    quantiles = special.ndtri(0.5 + 0.5 * (np.arange(1, m + 1) - 0.5) / m)
    points = []
    for j, qv in zip(order, quantiles, strict=True):
        point = {"term": names[j], "abs_effect": float(abs(effects[j])), "quantile": float(qv)}
        if in_model is not None:
            point["in_model"] = bool(in_model[j])
        points.append(point)
    return points
