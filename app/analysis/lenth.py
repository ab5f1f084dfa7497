"""Effects of two-level designs, half-normal plot data and Lenth's pseudo standard error.

Lenth (1989), "Quick and easy analysis of unreplicated factorials", Technometrics 31(4):
s0 = 1.5 median|c|, PSE = 1.5 median{|c| : |c| < 2.5 s0}, ME = t(0.975; m/3) PSE and
SME = t(gamma; m/3) PSE with gamma = (1 + 0.95^(1/m)) / 2, for m effects. Verified by hand
arithmetic on the e-Handbook SPLETT3 effects in tests/analysis/test_lenth.py.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import stats


@dataclass(frozen=True)
class LenthResult:
    pse: float
    me: float
    sme: float
    df: float
    s0: float

    def to_dict(self) -> dict:
        return {"pse": self.pse, "me": self.me, "sme": self.sme, "df": self.df, "s0": self.s0}


def lenth(effects: np.ndarray, level: float = 0.95) -> LenthResult:
    """Lenth's PSE, margin of error ME and simultaneous margin SME for ``effects``."""
    c = np.abs(np.asarray(effects, dtype=float))
    m = len(c)
    if m < 2:
        raise ValueError("Lenth's method needs at least two effects")
    s0 = 1.5 * float(np.median(c))
    trimmed = c[c < 2.5 * s0]
    pse = 1.5 * float(np.median(trimmed)) if len(trimmed) else 0.0
    df = m / 3.0
    me = float(stats.t.ppf(0.5 + level / 2.0, df)) * pse
    gamma = (1.0 + level ** (1.0 / m)) / 2.0
    sme = float(stats.t.ppf(gamma, df)) * pse
    return LenthResult(pse=pse, me=me, sme=sme, df=df, s0=s0)


def half_normal_points(names: list[str], effects: np.ndarray) -> list[dict]:
    """|effect| sorted ascending with half-normal quantiles Phi^-1(0.5 + 0.5 (i - 0.5) / m)."""
    order = np.argsort(np.abs(effects), kind="stable")
    m = len(effects)
    quantiles = stats.norm.ppf(0.5 + 0.5 * (np.arange(1, m + 1) - 0.5) / m)
    return [
        {"term": names[j], "abs_effect": float(abs(effects[j])), "quantile": float(qv)}
        for j, qv in zip(order, quantiles, strict=True)
    ]
