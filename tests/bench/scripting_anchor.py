"""The scripting anchor of `make bench`: what a scripting user writes for the same job as
`plumbline check FILE --model quadratic` (not a test; run by bench_scale.py).

pandas ``read_csv``; statsmodels OLS on the full quadratic model in coded units; closed-form
leverage and internally and externally studentized residuals, Cook's distance; Anderson-Darling
on the residuals, the Durbin-Watson statistic in run order, Breusch-Pagan against the fitted
values; a printed summary. Usage: scripting_anchor.py FILE RESPONSE RUN_ORDER FACTOR...
"""

from __future__ import annotations

import sys
from itertools import combinations

import numpy as np
import pandas as pd
import statsmodels.api as sm
from scipy import stats
from statsmodels.stats.diagnostic import het_breuschpagan, normal_ad
from statsmodels.stats.stattools import durbin_watson


def main(path: str, response: str, order: str, factors: list[str]) -> None:
    frame = pd.read_csv(path)
    x = frame[factors].to_numpy(dtype=float)
    lo, hi = x.min(axis=0), x.max(axis=0)
    z = (x - (lo + hi) / 2) / ((hi - lo) / 2)
    k = z.shape[1]
    cols = [np.ones(len(z))] + [z[:, j] for j in range(k)]
    cols += [z[:, i] * z[:, j] for i, j in combinations(range(k), 2)]
    cols += [z[:, j] ** 2 for j in range(k)]
    xm = np.column_stack(cols)
    y = frame[response].to_numpy(dtype=float)
    fit = sm.OLS(y, xm).fit()
    n, p = xm.shape
    q, _ = np.linalg.qr(xm)
    h = np.einsum("ij,ij->i", q, q)
    e = fit.resid
    s2 = e @ e / (n - p)
    r = e / np.sqrt(s2 * (1 - h))
    t = r * np.sqrt((n - p - 1) / (n - p - r ** 2))
    cook = r ** 2 * h / (p * (1 - h))
    ad, ad_p = normal_ad(e)
    dw = durbin_watson(e[np.argsort(frame[order].to_numpy(), kind="stable")])
    bp = het_breuschpagan(e, np.column_stack([np.ones(n), fit.fittedvalues]))
    print(fit.summary().tables[1].as_text()[:200])
    print(f"R2 {fit.rsquared:.4f}  AD {ad:.3f} (p {ad_p:.3g})  DW {dw:.3f}  BP p {bp[1]:.3g}  "
          f"max |t| {np.abs(t).max():.3f} (Bonferroni p "
          f"{min(1.0, n * 2 * stats.t.sf(np.abs(t).max(), n - p - 1)):.3g})  "
          f"max Cook {cook.max():.3g}  max h {h.max():.3g}")


if __name__ == "__main__":
    main(sys.argv[1], sys.argv[2], sys.argv[3], sys.argv[4:])
