"""The per-recording tables of a batch: built from results, typed, written, read back.

A table built from fresh results and the same table read back from its CSV get identical
values and dtypes (:func:`type_table` is applied on both ways), so ``beatlab compare``
reproduces the statistics of ``beatlab batch`` exactly.
"""

from __future__ import annotations

import importlib.util
import math
import os
import warnings
from collections.abc import Mapping, Sequence
from pathlib import Path

import numpy as np
import pandas as pd

from beatlab.batch._layout_cells import NUMBER_COLUMNS
from beatlab.batch.flags import QUALITY_COLUMNS
from beatlab.batch.layout import OVERRIDE_COLUMNS
from beatlab.errors import BeatlabWarning, InputError
from beatlab.io.writers import atomic_path
from beatlab.schema import ROW_FIELDS, TABLES

__all__ = [
    "BATCH_COLUMNS",
    "BEAT_DTYPES",
    "ROW_DTYPES",
    "beats_table",
    "read_table",
    "recordings_table",
    "remove_table",
    "type_table",
    "write_table",
]

BATCH_COLUMNS = ("status", "error", "warnings")
"""Columns the batch adds to each recording after the metrics."""

ROW_DTYPES = {
    **{f.name: f.dtype for f in ROW_FIELDS},
    "n_beating_regions": "int",
    "mixed": "boolean",
    "quality_flags": "str",
    "measured_region": "int",
}
"""Schema type of every metric and quality-flag column of ``recordings.csv``."""

BEAT_DTYPES = {f.name: f.dtype for f in TABLES["beats"].columns}
"""Schema type of every beat column of ``beats.csv``."""

# Layout overrides the analysis reports back: one column, the value used (layout's if failed).
_MERGED = tuple(name for name in OVERRIDE_COLUMNS if name in ROW_DTYPES)
# Layout columns left out of beats.csv: bookkeeping, not a description of the recording.
_NOT_IN_BEATS = frozenset(
    (
        *("layout_row", "path_as_given", "concentration_as_given", "unit_as_given"),
        *("exclude", "exclude_reason", *OVERRIDE_COLUMNS),
    )
)


def _missing(value) -> bool:
    if value is None or value is pd.NA:
        return True
    if isinstance(value, str):
        return value == ""
    return isinstance(value, float | np.floating) and math.isnan(value)


def _float(value) -> float:
    return math.nan if _missing(value) else float(value)


def _integer(value):
    return None if _missing(value) else int(float(value)) if isinstance(value, str) else int(value)


def _boolean(value):
    if _missing(value):
        return None
    if isinstance(value, str):
        return {"true": True, "false": False}[value.strip().lower()]
    return bool(value)


def _column(values: pd.Series, kind: str) -> pd.Series | pd.api.extensions.ExtensionArray:
    """One column in the dtype of its schema type (``layout`` types included)."""
    native = values.dtype != object and not pd.api.types.is_string_dtype(values)
    if kind == "float":
        return values.astype(float) if native else values.map(_float).astype(float)
    if kind == "int":
        return pd.array([_integer(v) for v in values], dtype="Int64")
    if kind in ("bool", "boolean"):
        flags = [_boolean(v) for v in values]
        has_null = any(v is None for v in flags)
        return pd.array(flags, dtype="boolean" if has_null or kind == "boolean" else bool)
    if kind == "str":  # a metric: missing is null
        return values.map(lambda v: None if _missing(v) else str(v)).astype(object)
    return values.map(lambda v: "" if _missing(v) else str(v)).astype(object)  # text: blank


def _kind(name: str, schema: Mapping[str, str]) -> str:
    if name in schema:
        return schema[name]
    if name in NUMBER_COLUMNS:
        return "float"
    if name == "layout_row":
        return "int"
    if name == "exclude":
        return "bool"
    return "text"


def type_table(table: pd.DataFrame, schema: Mapping[str, str]) -> pd.DataFrame:
    """Every column in the dtype of its type, whether fresh or read back from CSV.

    Parameters
    ----------
    table : pandas.DataFrame
        A recordings or beats table, values native or text.
    schema : Mapping
        Column name -> ``float``, ``int``, ``bool``, ``boolean`` or ``str`` for the analysis
        columns. Known numeric layout columns are float, ``layout_row`` int, ``exclude``
        bool; every other column is text (blank ``""``).

    Returns
    -------
    pandas.DataFrame
        A new table: floats ``float64``, integers ``Int64``, flags ``bool`` (``boolean``
        when some are missing), metric text ``object`` with None when missing, other text
        ``object`` with ``""`` when blank.
    """
    return pd.DataFrame(
        {name: _column(table[name], _kind(name, schema)) for name in table.columns},
        index=pd.RangeIndex(len(table)),
    )


def _renamed(layout: pd.DataFrame) -> pd.DataFrame:
    """The layout with its columns that collide with batch columns renamed ``<name>_layout``."""
    taken = (set(ROW_DTYPES) | set(QUALITY_COLUMNS) | set(BATCH_COLUMNS)) - set(_MERGED)
    clash = [name for name in layout.columns if name in taken]
    if clash:
        warnings.warn(
            f"layout column(s) {', '.join(clash)} have the name of a result column; they are "
            "kept as <name>_layout in the batch tables (rename them in the layout)",
            BeatlabWarning,
            stacklevel=4,
        )
    return layout.rename(columns={name: f"{name}_layout" for name in clash}).reset_index(drop=True)


def recordings_table(layout: pd.DataFrame, rows: Sequence[Mapping]) -> pd.DataFrame:
    """One row per layout row: the layout's columns, the metrics and the batch columns.

    Parameters
    ----------
    layout : pandas.DataFrame
        The validated layout table.
    rows : sequence of Mapping
        The result row of each layout row, in layout order: ``Analysis.to_row()`` keys (all
        missing on failure or exclusion) and :data:`BATCH_COLUMNS`.

    Returns
    -------
    pandas.DataFrame
        Typed with :func:`type_table`. ``fps``, ``pixel_size_um`` and ``kind`` hold the value
        the analysis used (the layout's override where the recording has no result).
    """
    table = _renamed(layout)
    results = pd.DataFrame.from_records(list(rows), columns=[*ROW_DTYPES, *BATCH_COLUMNS])
    for name in _MERGED:
        if name in table.columns:
            used = results.pop(name).astype(object)
            table[name] = used.where(used.notna(), table[name].astype(object))
    return type_table(pd.concat([table, results], axis=1), ROW_DTYPES)


def beats_table(layout: pd.DataFrame, outcomes: Sequence[tuple[Mapping, pd.DataFrame]]):
    """Every beat of every recording, led by the recording's layout columns.

    Parameters
    ----------
    layout : pandas.DataFrame
        The validated layout table.
    outcomes : sequence of (row, beats)
        Per layout row, in layout order; beats of rows with status ``ok`` are used.

    Returns
    -------
    pandas.DataFrame
        The layout's descriptive columns (``recording_id``, ``path``, ``plate``, ``well``,
        ``fov``, ``timepoint``, ``role``, ``compound``, ``concentration``, ... but not its
        bookkeeping and override columns), then the columns of ``beats.csv`` of
        ``analyze``; typed with :func:`type_table`.
    """
    table = _renamed(layout)
    keep = [c for c in table.columns if c not in _NOT_IN_BEATS and c not in BEAT_DTYPES]
    parts = []
    for record, (row, beats) in zip(table[keep].to_dict("records"), outcomes, strict=True):
        if row.get("status") == "ok" and len(beats):
            lead = pd.DataFrame({name: [record[name]] * len(beats) for name in keep})
            parts.append(pd.concat([lead, beats.reset_index(drop=True)], axis=1))
    if not parts:
        return type_table(pd.DataFrame(columns=[*keep, *BEAT_DTYPES]), BEAT_DTYPES)
    return type_table(pd.concat(parts, ignore_index=True), BEAT_DTYPES)


def read_table(path: str | os.PathLike, schema: Mapping[str, str]) -> pd.DataFrame:
    """Read a table written by :func:`write_table` back with the same values and dtypes.

    Raises
    ------
    InputError
        If the file is missing or not a readable CSV.
    """
    try:
        raw = pd.read_csv(path, dtype=object, keep_default_na=False)
    except (OSError, ValueError) as exc:
        raise InputError(
            f"cannot read {path}: {exc}; run beatlab batch again to rewrite it"
        ) from None
    try:
        return type_table(raw, schema)
    except (ValueError, KeyError) as exc:
        raise InputError(
            f"{path} has a cell that does not fit its column ({exc}); restore the file or "
            "run beatlab batch again"
        ) from None


def _parquet_ready(table: pd.DataFrame) -> pd.DataFrame:
    """Object columns as nullable strings: Parquet needs one type per column."""
    out = table.copy()
    for name in out.columns:
        if out[name].dtype == object:
            out[name] = out[name].map(lambda v: None if _missing(v) else str(v)).astype("string")
    return out


def write_table(table: pd.DataFrame, folder: str | os.PathLike, name: str) -> list[Path]:
    """Write ``name.csv`` (and ``name.parquet`` when pyarrow is installed) atomically.

    Returns
    -------
    list of Path
        The files written.
    """
    folder = Path(folder)
    paths = [folder / f"{name}.csv"]
    with atomic_path(paths[0]) as tmp:
        table.to_csv(tmp, index=False)  # full precision: read_table gives the same numbers
    if importlib.util.find_spec("pyarrow") is not None:
        paths.append(folder / f"{name}.parquet")
        with atomic_path(paths[1]) as tmp:
            _parquet_ready(table).to_parquet(tmp, index=False)
    return paths


def remove_table(folder: str | os.PathLike, name: str) -> None:
    """Remove ``name.csv`` and ``name.parquet`` left by an earlier run, if any."""
    for suffix in (".csv", ".parquet"):
        Path(folder, name + suffix).unlink(missing_ok=True)
