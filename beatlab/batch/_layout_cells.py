"""Cell-level parsing of a plate layout: numbers, wells, choices, flags and units.

Every parser takes a column of stripped text cells and the spreadsheet row number of each
cell, returns the parsed column, and records each bad cell in a :class:`Problems` list rather
than raising, so that one error can list every problem of the layout.
"""

from __future__ import annotations

import math
import re

import numpy as np
import pandas as pd

ROLES = ("vehicle", "positive", "negative", "sample")
"""Values of the ``role`` column; blank means ``sample``."""

KINDS = ("opd", "phase", "hologram")
"""Values of the ``kind`` column (what the pixel values are); blank means the file decides."""

MEASURES = ("whole", "dominant")
"""Values of ``measure``: the whole analysed field (default) or only its dominant region."""

MOLAR_EXPONENTS = {"pM": -12, "nM": -9, "uM": -6, "mM": -3, "M": 0}
"""Convertible concentration units -> power of ten of mol/L."""

NUMBER_COLUMNS = {
    "concentration": "non-negative",
    "minutes_after_dose": None,
    "temperature_c": None,
    "cmax": "positive",
    "fps": "positive",
    "pixel_size_um": "positive",
    "wavelength_nm": "positive",
}
"""Numeric layout columns -> the bound they must respect (None: any finite number)."""

TEXT_COLUMNS = (
    "plate",
    "well",
    "fov",
    "condition",
    "compound",
    "unit",
    "protocol",
    "timepoint",
    "role",
    "kind",
    "measure",
    "exclude_reason",
)
"""Layout columns read as text (stripped of surrounding spaces)."""

PATH_COLUMNS = ("path", "reference", "regions")
"""Layout columns holding paths relative to the layout file's folder."""

KNOWN_COLUMNS = (*PATH_COLUMNS, *TEXT_COLUMNS, *NUMBER_COLUMNS, "exclude")
"""Every column name with a meaning; any other column is carried through unchanged."""

_UNIT_SPELLINGS = {"µM": "uM", "μM": "uM"}  # micro sign U+00B5 and Greek mu U+03BC
_NA_WORDS = {"", "na", "n/a", "nan", "none", "null"}
_TRUE = {"true", "yes", "1"}
_FALSE = {"false", "no", "0", ""}
_WELL = re.compile(r"^([A-Pa-p])0*([1-9][0-9]?)$")
_MAX_WELL_COLUMN = 24


_CONTROL = re.compile(r"[\x00-\x1f\x7f]")


def _one_line(text: str) -> str:
    """``text`` with its control characters escaped as Python writes them (``\\n``)."""
    return _CONTROL.sub(lambda match: repr(match.group())[1:-1], text)


class Problems:
    """Problems found in a layout, each tied to a spreadsheet row and a column."""

    def __init__(self) -> None:
        self._items: list[tuple[int, str, str]] = []

    def add(self, row: int, column: str, text: str) -> None:
        """Record one problem: spreadsheet ``row`` (header = 1), ``column``, what and fix."""
        self._items.append((int(row), column, text))

    def __bool__(self) -> bool:
        return bool(self._items)

    def message(self) -> str:
        """All problems, one per line, in row order, under a one-line heading.

        Control characters that cells or paths carry (a line break inside a quoted cell) are
        shown escaped (``\\r``), so that each problem stays on its own line.
        """
        items = sorted(self._items, key=lambda item: item[0])
        count = f"{len(items)} problem" + ("s" if len(items) > 1 else "")
        lines = [
            _one_line(f"row {row}, column {column or '(blank)'}: {text}")
            for row, column, text in items
        ]
        return f"the layout has {count}; fix each and run again:\n  " + "\n  ".join(lines)


def parse_numbers(
    cells: pd.Series, rows: pd.Series, *, column: str, problems: Problems
) -> pd.Series:
    """Parse a numeric column; blank (or NA, n/a, nan, none, null) is NaN.

    Returns
    -------
    pandas.Series of float
        NaN where blank or invalid (invalid cells are recorded in ``problems``).
    """
    bound = NUMBER_COLUMNS[column]
    values = np.full(len(cells), np.nan)
    for i, (text, row) in enumerate(zip(cells, rows, strict=True)):
        if text.lower() in _NA_WORDS:
            continue
        try:
            value = float(text)
        except ValueError:
            value = math.nan
        if not math.isfinite(value):
            problems.add(
                row,
                column,
                f"{text!r} is not a number; write a plain number such as 1.5 "
                "(decimal point, no unit) or leave the cell blank",
            )
        elif bound == "non-negative" and value < 0:
            problems.add(row, column, f"{text} is negative; write a value of 0 or more")
        elif bound == "positive" and value <= 0:
            problems.add(row, column, f"{text} is not positive; write a value above 0")
        else:
            values[i] = value
    return pd.Series(values, index=cells.index, dtype=float)


def parse_wells(cells: pd.Series, rows: pd.Series, *, problems: Problems) -> pd.Series:
    """Normalise well names (``a01`` -> ``A1``) on the 384-well grid (rows A-P, columns 1-24).

    Returns
    -------
    pandas.Series of str
        Upper-case row letter and column number without leading zeros; blank stays blank.
    """
    out = []
    for text, row in zip(cells, rows, strict=True):
        match = _WELL.match(text)
        if text and (match is None or int(match.group(2)) > _MAX_WELL_COLUMN):
            problems.add(
                row,
                "well",
                f"{text!r} is not a well name; use a row letter A-P and a column "
                "1-24 (96- or 384-well plate), e.g. B12 or b07",
            )
            out.append(text)
        else:
            out.append(f"{match.group(1).upper()}{int(match.group(2))}" if match else "")
    return pd.Series(out, index=cells.index, dtype=object)


def parse_choice(
    cells: pd.Series,
    rows: pd.Series,
    *,
    column: str,
    choices: tuple[str, ...],
    default: str,
    problems: Problems,
) -> pd.Series:
    """Parse a column with a fixed set of lower-case words; blank becomes ``default``."""
    out = []
    for text, row in zip(cells, rows, strict=True):
        word = text.lower()
        if word and word not in choices:
            blank = f"blank means {default}" if default else "or leave it blank"
            problems.add(
                row,
                column,
                f"{text!r} is not a {column}; use one of {', '.join(choices)} ({blank})",
            )
        out.append(word or default)
    return pd.Series(out, index=cells.index, dtype=object)


def parse_exclude(cells: pd.Series, rows: pd.Series, *, problems: Problems) -> pd.Series:
    """Parse the ``exclude`` flag: true/yes/1 or false/no/0/blank, in any case."""
    out = []
    for text, row in zip(cells, rows, strict=True):
        word = text.lower()
        if word not in _TRUE | _FALSE:
            problems.add(
                row,
                "exclude",
                f"{text!r} is not true or false; write true, false, yes, no, "
                "1 or 0 (blank means false)",
            )
        out.append(word in _TRUE)
    return pd.Series(out, index=cells.index, dtype=bool)


def canonical_unit(text: str) -> str:
    """The spelling used for a unit: ``µM``/``μM`` become ``uM``; others are unchanged."""
    return _UNIT_SPELLINGS.get(text, text)


def _convert(value: float, unit: str, target: str) -> float:
    """``value`` in molar ``unit`` expressed in molar ``target``, exactly for powers of ten."""
    step = MOLAR_EXPONENTS[unit] - MOLAR_EXPONENTS[target]
    return value * 10**step if step >= 0 else value / 10 ** (-step)


def harmonize_units(table: pd.DataFrame, *, problems: Problems) -> pd.DataFrame:
    """Check concentration units and convert each compound to its most common molar unit.

    ``table`` has float ``concentration``, text ``unit`` and ``compound`` and int
    ``layout_row``. A non-zero concentration needs a unit. Within one compound, rows whose
    unit differs from the compound's most common unit (ties: the first in layout order) are
    converted when both units are molar (pM, nM, uM, mM, M) and reported otherwise.

    Returns
    -------
    pandas.DataFrame
        A copy with ``concentration`` and ``unit`` converted.
    """
    out = table.copy()
    out["unit"] = out["unit"].map(canonical_unit)
    lacking = (out["concentration"].fillna(0) != 0) & (out["unit"] == "")
    for row, value in out.loc[lacking, ["layout_row", "concentration"]].itertuples(index=False):
        problems.add(row, "unit", f"concentration {value:g} has no unit; fill in one, e.g. uM")
    named = out[(out["compound"] != "") & (out["unit"] != "")]
    for compound, group in named.groupby("compound", sort=False):
        counts = group["unit"].value_counts(sort=False)
        target = counts.index[int(np.argmax(counts.to_numpy()))]  # first of the most common
        for index in group.index[group["unit"] != target]:
            unit = out.at[index, "unit"]
            if unit in MOLAR_EXPONENTS and target in MOLAR_EXPONENTS:
                out.at[index, "concentration"] = _convert(
                    out.at[index, "concentration"], unit, target
                )
                out.at[index, "unit"] = target
            else:
                problems.add(
                    out.at[index, "layout_row"],
                    "unit",
                    f"{unit!r} for compound "
                    f"{compound!r} cannot be converted to {target!r}, its unit in the other "
                    "rows; use one unit per compound (pM, nM, uM, mM and M are converted)",
                )
    return out
