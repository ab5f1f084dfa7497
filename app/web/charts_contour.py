"""Iso-lines of the contour chart: where the predicted surface crosses round values, with labels.

The surface is predicted on a regular grid (charts.GRID points a side); each line is traced by
marching squares, linear along each cell edge, so a line is exact for a surface that is a plane
across the cell and close for a curved one at this grid spacing (tests/web/test_charts.py checks
both). At a saddle cell the centre value (mean of the four corners) decides which corners join.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

# Aim for about this many lines across the surface's range.
LINES = 7


def nice_levels(z: np.ndarray, target: int = LINES) -> np.ndarray:
    """Round values inside the range of ``z`` (steps of 1, 2 or 5 times a power of ten)."""
    finite = z[np.isfinite(z)]
    if not len(finite) or finite.max() <= finite.min():
        return np.array([])
    raw = (finite.max() - finite.min()) / target
    power = 10.0 ** math.floor(math.log10(raw))
    step = next(m * power for m in (1, 2, 5, 10) if m * power >= raw)
    first = math.ceil(finite.min() / step) * step
    levels = np.arange(first, finite.max(), step)
    return np.round(levels, max(0, -math.floor(math.log10(step))) + 1)


def _cross(za: np.ndarray, zb: np.ndarray, a: np.ndarray, b: np.ndarray, level: float
           ) -> np.ndarray:
    """Where the level crosses each edge from a (value za) to b (value zb); NaN where it does
    not."""
    with np.errstate(invalid="ignore", divide="ignore"):
        t = (level - za) / (zb - za)
        crosses = (za >= level) != (zb >= level)
    return np.where(crosses, a + t * (b - a), np.nan)


def iso_segments(xs: np.ndarray, ys: np.ndarray, z: np.ndarray, level: float
                 ) -> list[tuple[float, float, float, float]]:
    """Line pieces (x, y, x2, y2) where ``z`` (shape len(ys) × len(xs)) equals ``level``."""
    z00, z01, z10, z11 = z[:-1, :-1], z[:-1, 1:], z[1:, :-1], z[1:, 1:]
    x0, x1 = np.meshgrid(xs[:-1], ys[:-1])[0], np.meshgrid(xs[1:], ys[:-1])[0]
    y0, y1 = np.meshgrid(xs[:-1], ys[:-1])[1], np.meshgrid(xs[:-1], ys[1:])[1]
    # each edge's crossing as (x, y); edges in the order bottom, right, top, left
    edges = [(_cross(z00, z01, x0, x1, level), y0),
             (x1, _cross(z01, z11, y0, y1, level)),
             (_cross(z10, z11, x0, x1, level), y1),
             (x0, _cross(z00, z10, y0, y1, level))]
    points = [np.stack(np.broadcast_arrays(ex, ey), axis=-1) for ex, ey in edges]
    found = np.stack([np.isfinite(p).all(axis=-1) for p in points], axis=-1)
    counts = found.sum(axis=-1)
    centre_above = (z00 + z01 + z10 + z11) / 4 >= level
    out = []
    for i, j in zip(*np.nonzero(counts >= 2), strict=True):
        on = [k for k in range(4) if found[i, j, k]]
        if len(on) == 4:
            # saddle: cut off the two corners on the other side from the centre
            pairs = ((0, 1), (2, 3)) if centre_above[i, j] == (z00[i, j] >= level) \
                else ((0, 3), (1, 2))
        else:
            pairs = ((on[0], on[1]),)
        for a, b in pairs:
            (xa, ya), (xb, yb) = points[a][i, j], points[b][i, j]
            out.append((float(xa), float(ya), float(xb), float(yb)))
    return out


def iso_lines(xs: np.ndarray, ys: np.ndarray, z: np.ndarray
              ) -> tuple[list[dict[str, Any]], list[dict[str, Any]]]:
    """Segments of every level and one label per level (placed on the piece nearest the
    middle of that level's pieces, so labels sit on their lines, not at the frame)."""
    segments, labels = [], []
    for level in nice_levels(z).tolist():
        pieces = iso_segments(xs, ys, z, level)
        if not pieces:
            continue
        segments += [{"x": a, "y": b, "x2": c, "y2": d, "level": level}
                     for a, b, c, d in pieces]
        mid = np.array([((a + c) / 2, (b + d) / 2) for a, b, c, d in pieces])
        centre = mid.mean(axis=0)
        span = np.array([np.ptp(xs) or 1.0, np.ptp(ys) or 1.0])
        at = mid[np.argmin((((mid - centre) / span) ** 2).sum(axis=1))]
        labels.append({"x": float(at[0]), "y": float(at[1]), "level": level,
                       "text": f"{level:g}"})
    return segments, labels


def band_colours(stops: list[str], n: int) -> list[str]:
    """``n`` colours spaced evenly along the palette ``stops`` (hex), interpolated in RGB."""
    rgb = np.array([[int(c[i:i + 2], 16) for i in (1, 3, 5)] for c in stops], dtype=float)
    at = np.linspace(0.0, len(stops) - 1.0, n) if n > 1 else np.array([0.0])
    low = np.floor(at).astype(int).clip(0, len(stops) - 1)
    high = np.minimum(low + 1, len(stops) - 1)
    mixed = rgb[low] + (rgb[high] - rgb[low]) * (at - low)[:, None]
    return ["#" + "".join(f"{int(round(v)):02x}" for v in colour) for colour in mixed]
