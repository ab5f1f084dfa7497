"""The fitted polynomial in coded units, and the canonical analysis of a quadratic one.

A :class:`Surface` is rebuilt from the ``model`` part of a stored result document (terms as factor
powers, coefficients in coded units, (X'X)^-1, s, residual df, transform), so setpoints can be
computed from the signed JSON alone. It evaluates many points at once, which the grid search and
the design-space map need; single-point answers for reports still go through
:func:`app.analysis.predict`, and tests check that the two agree.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import special

from .. import transforms
from ..spec import AnalysisError

# An eigenvalue whose magnitude is below this fraction of the largest magnitude counts as zero:
# the surface is then nearly flat along that eigenvector, a ridge. Our rule, chosen so that a
# direction with 5 % of the curvature of the steepest one is not reported as a clear optimum.
RIDGE_RATIO = 0.05


class SetpointError(AnalysisError):
    """A setpoint request that cannot be met; ``field`` names the offending field."""

    def __init__(self, message: str, field: str | None = None) -> None:
        super().__init__(message)
        self.field = field


def _model_part(result: dict, response: str) -> dict:
    model = result.get("model") if isinstance(result, dict) else None
    if not isinstance(model, dict) or "coefficients" not in model or "terms" not in model:
        raise SetpointError(f"Fit for '{response}' has no 'model' section to predict from",
                            field="model")
    return model


@dataclass(frozen=True)
class Surface:
    """One response's fitted model as a function of the coded factors.

    ``powers[t]`` lists (factor index, exponent) for term ``t``; ``coef`` holds the term
    coefficients and ``intercept`` the constant; block columns (effect coded) sit at 0, so
    predictions average over blocks as :func:`app.analysis.predict` does.
    """

    response: str
    factor_names: tuple[str, ...]
    powers: tuple[tuple[tuple[int, int], ...], ...]
    intercept: float
    coef: np.ndarray
    n_block: int
    xtx_inv: np.ndarray
    s: float | None
    df_resid: int
    transform: str
    lam: float | None

    @classmethod
    def from_result(cls, result: dict, response: str) -> Surface:
        model = _model_part(result, response)
        if any(f.get("levels") is not None for f in model["factors"]):
            # reduced to the continuous factors first (levels.at_levels)
            raise SetpointError(f"Fit for '{response}' has categorical factors: the surface "
                                "is taken with each at one level", field="factors")
        names = tuple(f["name"] for f in model["factors"])
        index = {n: i for i, n in enumerate(names)}
        powers = []
        for term in model["terms"]:
            try:
                powers.append(tuple((index[n], int(p)) for n, p in term["powers"]))
            except KeyError as err:
                raise SetpointError(f"Fit for '{response}': term '{term.get('name')}' names a "
                                    f"factor that is not among its factors", field="terms") from err
        b = np.asarray(model["coefficients"], dtype=float)
        n_block = len(model.get("block_columns", []))
        s = model.get("s")
        return cls(response=response, factor_names=names, powers=tuple(powers),
                   intercept=float(b[0]), coef=b[1 + n_block:], n_block=n_block,
                   xtx_inv=np.asarray(model["xtx_inv"], dtype=float),
                   s=None if s is None else float(s), df_resid=int(model["df_resid"]),
                   transform=model.get("transform", "none"), lam=model.get("lambda"))

    def _term_columns(self, coded: np.ndarray) -> np.ndarray:
        coded = np.atleast_2d(coded)
        cols = np.ones((coded.shape[0], len(self.powers)))
        for t, term in enumerate(self.powers):
            for i, p in term:
                cols[:, t] *= coded[:, i] ** p
        return cols

    def model_scale(self, coded: np.ndarray) -> np.ndarray:
        """x'b on the model (possibly transformed) scale at each row of ``coded``."""
        return self.intercept + self._term_columns(coded) @ self.coef

    def response_scale(self, coded: np.ndarray) -> np.ndarray:
        """The back-transformed prediction; NaN where the model value has no pre-image."""
        return np.asarray(transforms.inverse(self.model_scale(coded), self.transform, self.lam))

    def has_intervals(self) -> bool:
        return self.s is not None and np.isfinite(self.s) and self.df_resid > 0

    def intervals(self, coded: np.ndarray, level: float = 0.95) -> dict[str, np.ndarray]:
        """Vectorised prediction with CI and PI ends on the response scale (as ``predict``)."""
        if not self.has_intervals():
            raise SetpointError(f"Fit for '{self.response}' has no residual degrees of freedom, "
                                "so it has no prediction intervals", field="df_resid")
        cols = self._term_columns(coded)
        rows = np.hstack([np.ones((cols.shape[0], 1)), np.zeros((cols.shape[0], self.n_block)),
                          cols])
        z = rows @ np.concatenate([[self.intercept], np.zeros(self.n_block), self.coef])
        lev = np.einsum("ij,jk,ik->i", rows, self.xtx_inv, rows)
        t = float(special.stdtrit(self.df_resid, 0.5 + level / 2.0))
        half_ci = t * self.s * np.sqrt(lev)
        half_pi = t * self.s * np.sqrt(1.0 + lev)
        out = {"predicted": transforms.inverse(z, self.transform, self.lam)}
        for name, half in (("ci", half_ci), ("pi", half_pi)):
            lo = transforms.inverse(z - half, self.transform, self.lam)
            hi = transforms.inverse(z + half, self.transform, self.lam)
            if transforms.is_decreasing(self.transform, self.lam):
                lo, hi = hi, lo
            out[name + "_low"], out[name + "_high"] = lo, hi
        return out

    def model_gradient(self, coded: np.ndarray) -> np.ndarray:
        """d(x'b)/dx at one coded point, from the term powers (exact for a polynomial)."""
        x = np.asarray(coded, dtype=float)
        grad = np.zeros(len(self.factor_names))
        for term, c in zip(self.powers, self.coef, strict=True):
            for j, (i, p) in enumerate(term):
                part = c * p * x[i] ** (p - 1)
                for jj, (ii, pp) in enumerate(term):
                    if jj != j:
                        part *= x[ii] ** pp
                grad[i] += part
        return grad

    def gradient(self, coded: np.ndarray) -> np.ndarray:
        """d(prediction)/dx on the response scale: the chain rule through the back-transform."""
        z = float(self.model_scale(np.asarray(coded, dtype=float))[0])
        return _inverse_slope(z, self.transform, self.lam) * self.model_gradient(coded)

    def quadratic_parts(self) -> tuple[float, np.ndarray, np.ndarray] | None:
        """(b0, b, B) with y = b0 + x'b + x'Bx, or None unless every term has degree <= 2 and at
        least one is a square. B holds the square coefficients on its diagonal and half of each
        two-factor interaction coefficient off it."""
        k = len(self.factor_names)
        b, big_b = np.zeros(k), np.zeros((k, k))
        has_square = False
        for term, c in zip(self.powers, self.coef, strict=True):
            degree = sum(p for _, p in term)
            if degree > 2:
                return None
            if len(term) == 1 and term[0][1] == 1:
                b[term[0][0]] += c
            elif len(term) == 1:
                big_b[term[0][0], term[0][0]] += c
                has_square = True
            else:
                (i, _), (j, _) = term
                big_b[i, j] += c / 2.0
                big_b[j, i] += c / 2.0
        return (self.intercept, b, big_b) if has_square else None


def _inverse_slope(z: float, transform: str, lam: float | None) -> float:
    """Derivative of the back-transform y = g^-1(z); NaN where g^-1 is undefined."""
    with np.errstate(all="ignore"):
        if transform == "none":
            return 1.0
        if transform == "log" or (transform == "boxcox" and abs(lam) < 1e-12):
            return float(np.exp(z))
        if transform == "sqrt":
            return 2.0 * z if z >= 0 else float("nan")
        if transform == "inverse":
            return -1.0 / z**2 if z > 0 else float("nan")
        if transform == "boxcox":
            base = lam * z + 1.0
            return float(base ** (1.0 / lam - 1.0)) if base > 0 else float("nan")
    raise AnalysisError(f"Unknown transform '{transform}'")


@dataclass(frozen=True)
class CanonicalAnalysis:
    """Stationary point x_s = -B^-1 b / 2 and the eigen-decomposition of B (coded units).

    ``kind`` describes the response scale: a maximum of 1/y's model is a minimum of y.
    ``unique`` is False when B is singular among the active factors (a pseudo-inverse point is
    reported then); ``inactive`` lists factors absent from the model, placed at the centre.
    """

    coded: np.ndarray
    eigenvalues: np.ndarray
    eigenvectors: np.ndarray
    kind: str
    predicted_model_scale: float
    unique: bool
    inactive: tuple[str, ...]


def classify(eigenvalues: np.ndarray, ridge_ratio: float = RIDGE_RATIO) -> str:
    """``ridge`` when min |λ| <= ridge_ratio · max |λ|; else ``maximum`` (all λ < 0),
    ``minimum`` (all λ > 0) or ``saddle`` (mixed signs)."""
    lam = np.asarray(eigenvalues, dtype=float)
    mags = np.abs(lam)
    if mags.max() == 0 or mags.min() <= ridge_ratio * mags.max():
        return "ridge"
    if np.all(lam < 0):
        return "maximum"
    if np.all(lam > 0):
        return "minimum"
    return "saddle"


def canonical_analysis(surface: Surface) -> CanonicalAnalysis | None:
    """Canonical analysis of a quadratic response surface in coded units.

    Solves b + 2Bx = 0 for the stationary point and takes the eigenvalues (ascending) and
    eigenvectors of the symmetric B, over the factors that appear in the model. Reference: Box &
    Wilson (1951); Myers, Montgomery & Anderson-Cook, *Response Surface Methodology*, ch. 6
    (recalled from memory). Verified in tests/analysis/optimize/test_canonical.py against a
    two-factor example solved by hand. Returns None for a model that is not quadratic.
    """
    parts = surface.quadratic_parts()
    if parts is None:
        return None
    _, b, big_b = parts
    k = len(surface.factor_names)
    active = sorted({i for term in surface.powers for i, _ in term})
    sub_b, sub_bb = b[active], big_b[np.ix_(active, active)]
    lam, vec = np.linalg.eigh(sub_bb)
    kind = classify(lam)
    unique = kind != "ridge"
    x_sub = (np.linalg.solve(sub_bb, -0.5 * sub_b) if unique
             else -0.5 * np.linalg.pinv(sub_bb) @ sub_b)
    x = np.zeros(k)
    x[active] = x_sub
    if transforms.is_decreasing(surface.transform, surface.lam):
        kind = {"maximum": "minimum", "minimum": "maximum"}.get(kind, kind)
    inactive = tuple(n for i, n in enumerate(surface.factor_names) if i not in active)
    return CanonicalAnalysis(coded=x, eigenvalues=lam, eigenvectors=vec, kind=kind,
                             predicted_model_scale=float(surface.model_scale(x)[0]),
                             unique=unique, inactive=inactive)
