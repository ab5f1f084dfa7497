"""What each column of an upload means, and a first guess at it for the user to confirm."""

from __future__ import annotations

import math
import re
from dataclasses import asdict, dataclass

import numpy as np
import pandas as pd

from .errors import IngestError
from .raw import RawTable

ROLES = ("factor", "response", "run_order", "block", "covariate", "label", "ignore")
COVARIATE_KINDS = ("numeric", "categorical")

# Header words that say what a column is. Matched against the lower-cased name with
# punctuation turned into spaces.
_RUN_ORDER_NAMES = {"run", "run order", "runorder", "run no", "run number", "run nr", "order",
                    "run sequence", "sequence", "run seq"}
# Standard order is the design's bookkeeping, not the order runs were made in; treating it as
# run order would make the time-order checks look at the wrong sequence.
_STANDARD_ORDER_NAMES = {"std order", "std", "standard order", "std run", "stdorder"}
_BLOCK_NAMES = {"block", "blocks", "blk", "block no", "block number"}
_LABEL_NAMES = {"id", "label", "name", "run label", "run id", "run name", "sample", "sample id"}
_COVARIATE_WORDS = {"humidity", "ambient", "operator", "lot", "batch", "shift", "room",
                    "covariate", "analyst", "supplier", "instrument", "weather"}
_UNITS = re.compile(r"^(?P<name>.*?)\s*[\(\[](?P<units>[^()\[\]]+)[\)\]]\s*$")
# A factor has few distinct settings; more than this and the column is read as a measurement.
_MAX_FACTOR_LEVELS = 5
# Roles one column at most may have, with their words.
SINGLE_ROLES = {"run_order": "run order", "block": "block", "label": "label"}


@dataclass(frozen=True)
class ColumnRole:
    """The role of one column.

    Attributes
    ----------
    role : {"factor", "response", "run_order", "block", "covariate", "label", "ignore"}
    units : str or None
    low, high : float or None
        Factors only: declared low and high levels in actual units, the ones coded -1 and +1.
        Both None means the column already holds coded values.
    kind : {"numeric", "categorical"} or None
        Covariates: numeric or categorical. Factors: "categorical" for a factor whose levels
        are names (supplier, operator, machine); None (or "numeric") for a continuous factor,
        so the stored roles of continuous factors are what they always were.
    """

    role: str
    units: str | None = None
    low: float | None = None
    high: float | None = None
    kind: str | None = None

    def __post_init__(self):
        if self.role not in ROLES:
            raise IngestError.single(
                f"Role '{self.role}' is not known; use one of {', '.join(ROLES)}.")
        if self.kind is not None and self.kind not in COVARIATE_KINDS:
            raise IngestError.single(
                f"{'Factor' if self.role == 'factor' else 'Covariate'} kind '{self.kind}' is not "
                "known; use numeric or categorical.")
        if self.categorical_factor and (self.low is not None or self.high is not None):
            raise IngestError.single(
                "A categorical factor has named levels, not low and high numbers; leave low "
                "and high out.")

    @property
    def categorical_factor(self) -> bool:
        """True for a factor whose levels are names."""
        return self.role == "factor" and self.kind == "categorical"

    def to_dict(self) -> dict:
        """Return all fields as a JSON-able dict."""
        return asdict(self)

    @classmethod
    def from_dict(cls, d: dict) -> ColumnRole:
        """Build from :meth:`to_dict` output; unknown keys or non-numeric levels are refused."""
        if not isinstance(d, dict) or "role" not in d:
            raise IngestError.single("A column role needs a 'role' field.")
        unknown = set(d) - {"role", "units", "low", "high", "kind"}
        if unknown:
            raise IngestError.single(
                f"Column role has unknown field(s): {', '.join(sorted(unknown))}.")
        levels = {}
        for key in ("low", "high"):
            value = d.get(key)
            if value is not None and (isinstance(value, bool)
                                      or not isinstance(value, int | float)):
                raise IngestError.single(f"Field '{key}' must be a number, not {value!r}.")
            levels[key] = None if value is None else float(value)
        return cls(role=d["role"], units=d.get("units"), kind=d.get("kind"), **levels)


def _plain(name: str) -> str:
    return " ".join(re.sub(r"[^0-9a-z]+", " ", name.lower()).split())


def split_units(name: str) -> tuple[str, str | None]:
    """Split ``"Temperature (°C)"`` or ``"Time [min]"`` into the name and its units."""
    match = _UNITS.match(name)
    if match and match.group("name"):
        return match.group("name"), match.group("units").strip()
    return name, None


def suggest_levels(values: list[float]) -> tuple[float, float]:
    """Suggest the declared low and high levels (coded -1, +1) from a factor's settings.

    With five distinct levels placed symmetrically about the centre (a central composite
    design: -alpha, -1, 0, +1, +alpha) the second-smallest and second-largest are the cube
    levels; otherwise the smallest and largest are used (two-level designs, with or without
    centre points, and Box-Behnken designs). Verified on the demo designs in ``tests/ingest``.
    """
    levels = sorted(set(values))
    if len(levels) == 5:
        span = levels[-1] - levels[0]
        centre = levels[2]
        if (math.isclose(levels[0] + levels[4], 2 * centre, abs_tol=1e-6 * span)
                and math.isclose(levels[1] + levels[3], 2 * centre, abs_tol=1e-6 * span)):
            return levels[1], levels[3]
    return levels[0], levels[-1]


def _summary(raw: RawTable, column: str) -> tuple[int, np.ndarray | None, int]:
    """Count the filled cells, their distinct numbers in order of first appearance (None unless
    every cell is a number) and the distinct values (numbers compared as numbers, text as
    text), for one column at once."""
    filled = ~raw.missing(column)
    count = int(filled.sum())
    if not count:
        return 0, None, 0
    values = raw.numbers(column)[filled]
    if np.isnan(values).any():
        return count, None, len(pd.unique(raw.frame[column].to_numpy(dtype=object)[filled]))
    distinct = pd.unique(values)
    return count, distinct, len(distinct)


def _once(role: str, units: str | None, taken: set[str]) -> ColumnRole:
    """The role for the first column that claims it; later claimants are ignored."""
    if role in taken:
        return ColumnRole("ignore", units=units)
    taken.add(role)
    return ColumnRole(role, units=units)


def suggest_roles(raw: RawTable) -> dict[str, ColumnRole]:
    """Guess a role for every column; the user confirms or changes each one.

    Rules, in order: header words for run order, block and label; standard-order columns are
    ignored; empty or single-valued columns are ignored; numeric columns with at most five
    distinct values (and no more than half as many as there are rows) are factors with levels
    from :func:`suggest_levels`; numeric columns whose header names a recorded condition
    (humidity, operator, lot ...) are numeric covariates; other numeric columns are responses. A
    column of numbers with a few typing slips (no more than one filled cell in five is not a
    number) is judged by its numbers, so storing it names the slips. Otherwise a text column
    with no gaps and at most five distinct values (no more than half as many as rows) is a
    categorical factor, unless its header names a recorded condition; other text columns
    repeating values are categorical covariates, and a text column with a value per row is the
    label. Units written in brackets after the header name are carried over.
    """
    return {column: role for column, (role, _why) in suggest_with_reasons(raw).items()}


def _text_note(raw: RawTable, column: str, filled: int, advice: str = "") -> str:
    """For a column that is mostly numbers: how many cells are not, and the first one (then
    ``advice``)."""
    cells = raw.frame[column].to_numpy(dtype=object)
    odd = np.flatnonzero(np.isnan(raw.numbers(column)) & ~raw.missing(column))
    if not len(odd) or len(odd) * 2 > filled:
        return ""
    first = int(odd[0])
    return (f" ('{cells[first]}' in row {int(raw.frame.index[first])} is not a number"
            + (f", nor are {len(odd) - 1} more cells" if len(odd) > 1 else "") + advice + ")")


# A column is numbers with typing slips when no more than this share of its filled cells are not
# numbers (one cell in five; a rule of our own: more than that reads as a text column).
_SLIP_SHARE = 0.2


def _mostly_numbers(raw: RawTable, column: str, filled: int) -> np.ndarray | None:
    """The distinct numbers of a column whose filled cells are numbers but for a few slips,
    in order of first appearance; None for any other column."""
    values = raw.numbers(column)[~raw.missing(column)]
    numbers = values[~np.isnan(values)]
    if not len(numbers) or filled - len(numbers) > _SLIP_SHARE * filled:
        return None
    return pd.unique(numbers)


def _numeric_role(units: str | None, words: set[str], n: int, filled: int,
                  numbers: np.ndarray, distinct: int,
                  every_row: str = "a number in every row") -> tuple[ColumnRole, str]:
    """The role suggested for a column of numbers (``numbers`` its distinct values);
    ``every_row`` says how its rows are filled when that makes it a factor."""
    blanks = n - filled
    if words & _COVARIATE_WORDS:
        return (ColumnRole("covariate", units=units, kind="numeric"),
                "numbers, and the header names a recorded condition")
    if filled == n and distinct <= _MAX_FACTOR_LEVELS and distinct * 2 <= n:
        low, high = suggest_levels(numbers.tolist())  # the distinct settings
        return (ColumnRole("factor", units=units, low=low, high=high),
                f"{every_row}, {distinct} distinct settings")
    return ColumnRole("response", units=units), (
        f"numbers, {blanks} blank cell{'s' if blanks > 1 else ''} (a factor needs a setting in "
        "every row)" if blanks and distinct <= _MAX_FACTOR_LEVELS
        else f"numbers, {distinct} distinct values (more than a factor's "
             f"{_MAX_FACTOR_LEVELS} settings)")


def suggest_with_reasons(raw: RawTable) -> dict[str, tuple[ColumnRole, str]]:
    """:func:`suggest_roles` with, for each column, why that role was suggested, in words the
    preview shows (a single odd cell that changed the suggestion is named)."""
    out: dict[str, tuple[ColumnRole, str]] = {}
    taken: set[str] = set()
    n = raw.n_rows
    for column in raw.frame.columns:
        bare, units = split_units(column)
        plain = _plain(bare)
        words = set(plain.split())
        filled, numbers, distinct = _summary(raw, column)

        if plain in _STANDARD_ORDER_NAMES:
            role, why = ColumnRole("ignore", units=units), "the header names the standard order"
        elif plain in _RUN_ORDER_NAMES and numbers is not None:
            role, why = _once("run_order", units, taken), "the header names the run order"
        elif plain in _BLOCK_NAMES:
            role, why = _once("block", units, taken), "the header names a block"
        elif plain in _LABEL_NAMES or plain.endswith((" id", " label")):
            role, why = _once("label", units, taken), "the header names a run label"
        elif distinct <= 1:
            role = ColumnRole("ignore", units=units)
            why = "empty" if not filled else "the same value in every filled row"
        elif numbers is not None:
            role, why = _numeric_role(units, words, n, filled, numbers, distinct)
        elif (typed := _mostly_numbers(raw, column, filled)) is not None:
            # A typing slip in a column of numbers ('150 C', 'n/a'): suggested for what its
            # numbers are, so that storing names the cell instead of quietly making the column
            # text (a factor suggested as a covariate would leave the model).
            if len(typed) <= 1:
                role, why = ColumnRole("ignore", units=units), "one number in every filled row"
            else:
                role, why = _numeric_role(units, words, n, filled, typed, len(typed),
                                          "a number in every row but the slips")
            why += _text_note(raw, column, filled, "; correct it, or storing names it")
        elif (filled == n and distinct <= _MAX_FACTOR_LEVELS and distinct * 2 <= n
              and not words & _COVARIATE_WORDS):
            # Few names, none missing, each level used about twice or more: the shape of a
            # factor set on purpose (supplier A/B/C, machine 1/2). A header naming a recorded
            # condition (operator, lot ...) keeps it a covariate: noted, not designed.
            role = ColumnRole("factor", units=units, kind="categorical")
            why = (f"{distinct} names, none missing, each used about twice or more"
                   + _text_note(raw, column, filled))
        elif distinct < filled:
            role = ColumnRole("covariate", units=units, kind="categorical")
            why = "text repeating its values" + _text_note(raw, column, filled)
        else:
            role = _once("label", units, taken)
            why = "a different text in every row" + _text_note(raw, column, filled)
        if role.role == "ignore" and why.startswith("the header names") and \
                plain not in _STANDARD_ORDER_NAMES:
            why += ", but an earlier column already has that role"
        out[column] = (role, why)
    return out


def with_carried(suggested: dict[str, ColumnRole],
                 carried: dict[str, ColumnRole]) -> dict[str, ColumnRole]:
    """The suggested roles with ``carried`` (those confirmed for the same columns before) in
    their place. A role only one column may have stays with the column that carried it: any
    other column suggested for it is suggested as ignored instead."""
    taken = {r.role for r in carried.values() if r.role in SINGLE_ROLES}
    out = {c: (ColumnRole("ignore", units=r.units) if r.role in taken else r)
           for c, r in suggested.items()}
    return {**out, **carried}
