"""Invented demo data: two designed experiments at a fictional coatings plant.

Everything here is made up for the demo: the plant (Brackenmoor Coatings, Ellery Bend works),
the product (Corvane 40 clear floor lacquer), the people, and the numbers, which come from
stated models plus seeded noise so that every call returns the same bytes.

``python -m app.demo_data`` writes the two CSV files to ``app/demo/``.
"""

from __future__ import annotations

import csv
import io
import itertools
import sys
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from app.ingest import ColumnRole

PLANT = "Brackenmoor Coatings, Ellery Bend works"
PRODUCT = "Corvane 40 clear floor lacquer"
# (username, full name, roles) for the demo accounts.
DEMO_PEOPLE: tuple[tuple[str, str, tuple[str, ...]], ...] = (
    ("imarwick", "Ines Marwick", ("engineer",)),
    ("tvance", "Teodor Vance", ("approver",)),
    ("sokonjo", "Samira Okonjo", ("auditor",)),
)
DEMO_DIR = Path(__file__).resolve().parent / "demo"

# Rotatable axial distance for a three-factor central composite design: (2**3) ** (1/4) = 1.682.
CCD_ALPHA = 1.682


@dataclass(frozen=True)
class DemoStudy:
    """One demo study: its description, the uploaded file and the roles to confirm."""

    key: str
    title: str
    purpose: str
    process: str
    filename: str
    csv_bytes: bytes = field(repr=False)
    roles: dict[str, ColumnRole]


def _number(value: float, decimals: int) -> str:
    """Fixed decimals without trailing zeros, as an operator would type it: 150, 143.18."""
    text = f"{round(value, decimals):.{decimals}f}"
    return text.rstrip("0").rstrip(".") if "." in text else text


def _to_csv(header: list[str], rows: list[list[str]]) -> bytes:
    out = io.StringIO(newline="")
    writer = csv.writer(out, lineterminator="\n")
    writer.writerow(header)
    writer.writerows(rows)
    return out.getvalue().encode("utf-8")


def _two_level(k: int) -> np.ndarray:
    """Full 2**k factorial in standard order (first factor changes fastest), coded -1/+1."""
    return np.array([p[::-1] for p in itertools.product((-1.0, 1.0), repeat=k)])


# name, units, centre, half-range, decimals written
_RSM_FACTORS = (
    ("Cure temperature", "°C", 160.0, 10.0, 2),
    ("Cure time", "min", 25.0, 5.0, 2),
    ("Catalyst", "%", 1.0, 0.2, 4),
)


def rsm_coded_design() -> np.ndarray:
    """The 20-run rotatable central composite design in coded units, standard order.

    8 cube points (2**3), 6 axial points at +/-1.682 and 6 centre points.
    """
    cube = _two_level(3)
    axial = np.vstack([sign * CCD_ALPHA * np.eye(3)[i] for i in range(3) for sign in (-1, 1)])
    centre = np.zeros((6, 3))
    return np.vstack([cube, axial, centre])


def rsm_csv() -> bytes:
    """CSV bytes of the response-surface demo, rows in the recorded (randomised) run order.

    Responses follow full quadratic models in the coded factors with normal noise
    (hardness SD 1.6 s, gloss SD 0.7 GU), seed 2417.
    """
    rng = np.random.default_rng(2417)
    x = rsm_coded_design()
    a, b, c = x.T
    hardness = (132 + 6.5 * a + 4.0 * b + 2.5 * c + 1.8 * a * b - 0.9 * a * c + 0.6 * b * c
                - 4.2 * a**2 - 2.8 * b**2 - 1.6 * c**2 + rng.normal(0, 1.6, len(x)))
    gloss = (86 - 1.8 * a + 0.8 * b - 2.6 * c - 0.7 * a * c
             - 1.2 * a**2 - 0.5 * b**2 - 0.9 * c**2 + rng.normal(0, 0.7, len(x)))
    run_order = rng.permutation(len(x)) + 1
    header = ["Run order", "Panel ID", *(f[0] for f in _RSM_FACTORS), "Hardness", "Gloss"]
    rows = []
    for i in np.argsort(run_order):
        actual = [_number(centre + half * x[i, j], decimals)
                  for j, (_, _, centre, half, decimals) in enumerate(_RSM_FACTORS)]
        rows.append([str(run_order[i]), f"CV40-R{run_order[i]:02d}", *actual,
                     _number(hardness[i], 1), _number(gloss[i], 1)])
    return _to_csv(header, rows)


def rsm_roles() -> dict[str, ColumnRole]:
    """Roles of the response-surface demo columns; factor low/high are the cube (+/-1) levels."""
    roles = {"Run order": ColumnRole("run_order"), "Panel ID": ColumnRole("label")}
    for name, units, centre, half, _ in _RSM_FACTORS:
        roles[name] = ColumnRole("factor", units=units, low=centre - half, high=centre + half)
    roles["Hardness"] = ColumnRole("response", units="s")
    roles["Gloss"] = ColumnRole("response", units="GU")
    return roles


# name, units, low, high
_SCREENING_FACTORS = (
    ("Spray pressure", "bar", 2.0, 3.0),
    ("Line speed", "m/min", 4.0, 6.0),
    ("Slow solvent", "%", 10.0, 20.0),
    ("Flash-off time", "s", 60.0, 120.0),
    ("Oven airflow", "%", 60.0, 80.0),
)


def screening_coded_design() -> np.ndarray:
    """The 16-run 2**(5-1) fractional factorial, coded, standard order, generator E = ABCD.

    Defining relation I = ABCDE, so the design has resolution V.
    """
    base = _two_level(4)
    return np.column_stack([base, base.prod(axis=1)])


def screening_csv() -> bytes:
    """CSV bytes of the screening demo, rows in the recorded (randomised) run order.

    Film thickness follows a main-effects model with one interaction, plus a humidity effect
    of 0.25 µm per %RH and normal noise (SD 0.5 µm); ambient humidity drifts upward over the
    day. Seed 5120.
    """
    rng = np.random.default_rng(5120)
    x = screening_coded_design()
    n = len(x)
    run_order = rng.permutation(n) + 1
    humidity = 41.0 + 0.45 * (run_order - 1) + rng.normal(0, 1.2, n)
    a, b, c, d, e = x.T
    thickness = (48 + 3.2 * a - 2.6 * b + 0.4 * c + 1.5 * d + 0.3 * e + 1.1 * a * b
                 + 0.25 * (humidity - 45) + rng.normal(0, 0.5, n))
    header = ["Run order", "Panel ID", *(f[0] for f in _SCREENING_FACTORS),
              "Ambient humidity", "Film thickness"]
    rows = []
    for i in np.argsort(run_order):
        actual = [_number((low + high) / 2 + (high - low) / 2 * x[i, j], 2)
                  for j, (_, _, low, high) in enumerate(_SCREENING_FACTORS)]
        rows.append([str(run_order[i]), f"CV40-S{run_order[i]:02d}", *actual,
                     _number(humidity[i], 1), _number(thickness[i], 1)])
    return _to_csv(header, rows)


def screening_roles() -> dict[str, ColumnRole]:
    """Roles of the screening demo columns."""
    roles = {"Run order": ColumnRole("run_order"), "Panel ID": ColumnRole("label")}
    for name, units, low, high in _SCREENING_FACTORS:
        roles[name] = ColumnRole("factor", units=units, low=low, high=high)
    roles["Ambient humidity"] = ColumnRole("covariate", units="%RH", kind="numeric")
    roles["Film thickness"] = ColumnRole("response", units="µm")
    return roles


def rsm_study() -> DemoStudy:
    """The response-surface demo study."""
    return DemoStudy(
        key="rsm",
        title="Cure window for Corvane 40 topcoat",
        purpose=("Find the oven temperature, cure time and catalyst level that give the "
                 "hardest film without losing gloss, and show the model is fit to set the "
                 "production cure window."),
        process=(f"{PRODUCT}, line 2 cure oven at {PLANT}: coated test panels cured, then "
                 "pendulum hardness (s) and 60° gloss (GU) measured after 24 h."),
        filename="rsm_demo.csv", csv_bytes=rsm_csv(), roles=rsm_roles())


def screening_study() -> DemoStudy:
    """The screening demo study."""
    return DemoStudy(
        key="screening",
        title="Spray line screening for film thickness",
        purpose=("Find which of five spray-line settings move dry film thickness, before a "
                 "response-surface study on the important ones."),
        process=(f"{PRODUCT}, spray booth B at {PLANT}: panels sprayed and oven dried; dry "
                 "film thickness (µm) measured at five points and averaged. Ambient humidity "
                 "in the booth was logged for each run."),
        filename="screening_demo.csv", csv_bytes=screening_csv(), roles=screening_roles())


def demo_studies() -> tuple[DemoStudy, DemoStudy]:
    """Both demo studies: response surface first, then screening."""
    return rsm_study(), screening_study()


def write_demo_files(directory: Path = DEMO_DIR) -> list[Path]:
    """Write each demo study's CSV to ``directory`` and return the paths."""
    directory.mkdir(parents=True, exist_ok=True)
    paths = []
    for study in demo_studies():
        path = directory / study.filename
        path.write_bytes(study.csv_bytes)
        paths.append(path)
    return paths


def main() -> int:
    """Entry point of ``python -m app.demo_data``."""
    for path in write_demo_files():
        sys.stdout.write(f"wrote {path}\n")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
