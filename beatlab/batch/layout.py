"""Plate layouts: the CSV that lists a batch's recordings and what was done to each well.

:func:`read_layout` reads the CSV and :func:`validate_layout` checks every cell, resolves paths
and expands globs, so that a batch never starts on a layout with a typo in row 212: all
problems are reported at once, each with its spreadsheet row number (the header is row 1).
"""

from __future__ import annotations

import csv
import glob
import hashlib
import io
import math
import os
import re
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path

import pandas as pd

from beatlab.batch._layout_cells import (
    KINDS,
    KNOWN_COLUMNS,
    MEASURES,
    NUMBER_COLUMNS,
    PATH_COLUMNS,
    ROLES,
    Problems,
    harmonize_units,
    parse_choice,
    parse_exclude,
    parse_numbers,
    parse_wells,
)
from beatlab.errors import InputError

__all__ = [
    "KINDS",
    "KNOWN_COLUMNS",
    "MEASURES",
    "OVERRIDE_COLUMNS",
    "ROLES",
    "Layout",
    "read_layout",
    "validate_layout",
]

OVERRIDE_COLUMNS = ("fps", "pixel_size_um", "wavelength_nm", "kind", "reference", "regions")
"""Per-row overrides passed to :func:`beatlab.analyze` as keyword arguments."""

_ALWAYS = ("plate", "well", "fov", "timepoint", "role", "exclude", "exclude_reason")
_KEY = ("plate", "well", "fov", "timepoint")
_RESERVED = (
    "recording_id",
    "layout_row",
    "path_as_given",
    "concentration_as_given",
    "unit_as_given",
)
_GLOB = re.compile(r"[*?\[]")
_HDF5 = re.compile(r"^(.*\.(?:h5|hdf5|he5|nxs))(:/.*)?$", flags=re.IGNORECASE)
_ID_UNSAFE = re.compile(r"[^A-Za-z0-9.\-]+")
_EMPTY = (
    "the layout lists no recordings; add one row per recording under a header row that has "
    "at least a path column"
)


@dataclass(frozen=True, eq=False)
class Layout:
    """A validated plate layout.

    Attributes
    ----------
    table : pandas.DataFrame
        One row per recording, as returned by :func:`validate_layout`.
    base_dir : pathlib.Path
        Absolute folder of the layout file: relative paths in it start here.
    path : pathlib.Path or None
        The layout file, when read from one.
    """

    table: pd.DataFrame
    base_dir: Path
    path: Path | None = None

    def options_for(self, row: Mapping) -> dict:
        """Keyword overrides for :func:`beatlab.analyze` set on one row of :attr:`table`.

        Parameters
        ----------
        row : Mapping or pandas.Series
            One row of :attr:`table` (e.g. ``layout.table.iloc[i]``).

        Returns
        -------
        dict
            Only the overrides set on that row, among ``fps`` (Hz), ``pixel_size_um`` (um),
            ``wavelength_nm`` (nm), ``kind``, ``reference`` and ``regions`` (absolute paths).
        """
        options = {}
        for name in OVERRIDE_COLUMNS:
            value = row.get(name)
            if isinstance(value, str):
                if value:
                    options[name] = value
            elif value is not None and math.isfinite(float(value)):
                options[name] = float(value)
        return options


def read_layout(path: str | os.PathLike) -> Layout:
    """Read and validate a plate-layout CSV.

    Parameters
    ----------
    path : path-like
        A comma-separated file (semicolon or tab separated when the header holds no comma),
        UTF-8 with or without a byte-order mark, with a header row; see
        :func:`validate_layout` for the columns.

    Returns
    -------
    Layout
        The validated table and the layout's folder.

    Raises
    ------
    InputError
        If the file cannot be read as CSV, or lists one or more problems (all of them in one
        message, one per line).

    Examples
    --------
    A layout ``plate1.csv`` with the rows ``path,well,fps`` and ``A1.tif,a01,50``:

    >>> layout = read_layout("plate1.csv")  # doctest: +SKIP
    >>> layout.table.loc[0, ["recording_id", "well"]].tolist()  # doctest: +SKIP
    ['A1', 'A1']
    >>> layout.options_for(layout.table.iloc[0])  # doctest: +SKIP
    {'fps': 50.0}
    """
    path = Path(path)
    raw = _read_csv(path)
    base_dir = Path(os.path.abspath(path.parent))
    try:
        table = validate_layout(raw, base_dir=base_dir)
    except InputError as exc:
        raise InputError(f"layout {path}: {exc}") from None
    return Layout(table=table, base_dir=base_dir, path=path)


def _read_csv(path: Path) -> pd.DataFrame:
    """All cells of a CSV as text; spreadsheet rows kept in order (blank ones too)."""
    fix = "save it from the spreadsheet as CSV (comma separated, UTF-8)"
    try:
        text = path.read_text(encoding="utf-8-sig")
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(f"cannot read layout {path}: {exc}; {fix}") from None
    header = text.split("\n", 1)[0]
    sep = next((s for s in (",", ";", "\t") if s in header), ",")
    try:
        records = list(csv.reader(io.StringIO(text, newline=""), delimiter=sep))
    except csv.Error as exc:
        raise InputError(f"cannot read layout {path}: {exc}; {fix}") from None
    if not records or not any(cell.strip() for cell in records[0]):
        raise InputError(f"layout {path}: {_EMPTY}")
    names, body = records[0], records[1:]
    ragged = [
        str(i)
        for i, cells in enumerate(body, start=2)
        if len(cells) > len(names) and any(c.strip() for c in cells[len(names) :])
    ]
    if ragged:
        which = f"rows {', '.join(ragged)} have" if len(ragged) > 1 else f"row {ragged[0]} has"
        raise InputError(
            f"cannot read layout {path}: {which} more cells than the header's {len(names)}; "
            "name every column in row 1 or remove the extra cells"
        )
    cells = [(r + [""] * len(names))[: len(names)] for r in body]
    return pd.DataFrame(cells, columns=names, dtype=object)


def validate_layout(table: pd.DataFrame, *, base_dir: str | os.PathLike) -> pd.DataFrame:
    """Check every cell of a layout table, resolve its paths and expand its globs.

    Parameters
    ----------
    table : pandas.DataFrame
        The layout as read, one row per spreadsheet row below the header (row ``i`` of the
        table is spreadsheet row ``i + 2``); cells are text (other values are turned to text,
        missing ones to blank). Column names match case-insensitively, spaces read as ``_``.
    base_dir : path-like
        Folder that relative paths start from (the layout file's folder).

    Returns
    -------
    pandas.DataFrame
        One row per recording, fully blank rows dropped, a glob row expanded to one row per
        match in natural order. Columns: ``recording_id``, ``layout_row`` (spreadsheet row,
        int), the layout's columns in their order, then those it lacks among ``plate``,
        ``well``, ``fov``, ``timepoint`` (text, blank ``""``), ``role`` (blank: ``sample``),
        ``exclude`` (bool) and ``exclude_reason``, then ``path_as_given`` and, with a
        ``concentration`` column, ``unit`` and ``compound`` when missing,
        ``concentration_as_given`` and ``unit_as_given`` (the cells as written).

        ``path``, ``reference`` and ``regions`` hold absolute paths (an HDF5 ``:/dataset``
        suffix kept). ``well`` is normalised (``a01`` -> ``A1``). Numeric columns
        (``concentration``, ``minutes_after_dose``, ``temperature_c``, ``cmax``, ``fps``,
        ``pixel_size_um``, ``wavelength_nm``) are float, NaN when blank; a blank
        concentration of a vehicle row is 0. Within one compound, molar units are converted
        to the compound's most common unit. ``role`` and ``kind`` are lower case. Other
        columns are carried through unchanged.

    Raises
    ------
    InputError
        Listing every problem, one per line, each as ``row N, column C: what; fix``.

    Notes
    -----
    ``recording_id`` is ``plate_well_fov_timepoint`` (blank parts left out, characters other
    than letters, digits, ``.`` and ``-`` replaced by ``-``) when the row names a well, else
    ``rec-`` and the first 10 hex digits of the SHA-1 of the path (relative to ``base_dir``
    when inside it). A glob matching several files in a row with a blank ``fov`` gives each
    file its own ``fov``: the file name without its extension. Excluded rows skip the checks
    that their files exist but keep every other check.
    """
    base_dir = Path(os.path.abspath(base_dir))
    problems = Problems()
    text = _text_cells(table, problems)
    if text.empty:
        raise InputError(_EMPTY)
    parsed = _parse_cells(text, problems)
    if "path" in parsed.columns:
        parsed = _expand_paths(parsed, base_dir=base_dir, problems=problems)
        parsed.insert(0, "recording_id", _recording_ids(parsed, base_dir, problems))
    if problems:
        raise InputError(problems.message())
    return _arrange(parsed, given=list(text.columns))


def _text_cells(table: pd.DataFrame, problems: Problems) -> pd.DataFrame:
    """Canonical column names, known cells stripped text, ``layout_row``, blank rows gone."""
    known = {name.lower(): name for name in KNOWN_COLUMNS}
    names = [
        known.get(str(c).strip().lower().replace(" ", "_"), str(c).strip()) for c in table.columns
    ]
    for name in sorted({n for n in names if names.count(n) > 1}):
        problems.add(1, name, f"{name!r} names {names.count(name)} columns; keep one of them")
    if "path" not in names:
        problems.add(1, "path", "the layout has no path column; add one naming each recording")
    for name in sorted(set(names) & set(_RESERVED)):
        problems.add(1, name, f"{name!r} is a column beatlab adds; rename this column")
    out = pd.DataFrame(
        {i: table.iloc[:, i].map(_cell_text) for i in range(table.shape[1])}, dtype=object
    )
    out.columns = names
    out = out.loc[:, ~pd.Index(names).duplicated() & ~pd.Index(names).isin(_RESERVED)]
    for name in out.columns:
        if name in KNOWN_COLUMNS:
            out[name] = out[name].map(str.strip)
    out.insert(0, "layout_row", range(2, len(out) + 2))
    blank = (out.drop(columns="layout_row").map(str.strip) == "").all(axis=1)
    return out[~blank].reset_index(drop=True)


def _cell_text(value) -> str:
    if value is None or (isinstance(value, float) and math.isnan(value)) or value is pd.NA:
        return ""
    return str(value)


def _parse_cells(text: pd.DataFrame, problems: Problems) -> pd.DataFrame:
    """Types, defaults and checks of every known column except the paths."""
    out = text.copy()
    rows = out["layout_row"]
    for name in _ALWAYS:
        if name not in out.columns:
            out[name] = ""
    for name in NUMBER_COLUMNS:
        if name in out.columns:
            out[name] = parse_numbers(out[name], rows, column=name, problems=problems)
    out["well"] = parse_wells(out["well"], rows, problems=problems)
    out["role"] = parse_choice(
        out["role"], rows, column="role", choices=ROLES, default="sample", problems=problems
    )
    if "kind" in out.columns:
        out["kind"] = parse_choice(
            out["kind"], rows, column="kind", choices=KINDS, default="", problems=problems
        )
    if "measure" in out.columns:
        out["measure"] = parse_choice(
            out["measure"], rows, column="measure", choices=MEASURES, default="whole",
            problems=problems,
        )  # fmt: skip
    out["exclude"] = parse_exclude(out["exclude"], rows, problems=problems)
    if "concentration" in out.columns:
        if "unit" not in out.columns:
            out["unit"] = ""
        if "compound" not in out.columns:
            out["compound"] = ""
        out["concentration_as_given"] = out["concentration"]
        out["unit_as_given"] = out["unit"]
        vehicle = (out["role"] == "vehicle") & out["concentration"].isna()
        out.loc[vehicle, "concentration"] = 0.0
        out = harmonize_units(out, problems=problems)
    return out


def _resolve(text: str, base_dir: Path) -> str:
    """Absolute, normalised path of ``text`` (relative to ``base_dir``), HDF5 suffix kept."""
    match = _HDF5.match(text)
    file_part, dataset = (match.group(1), match.group(2) or "") if match else (text, "")
    return os.path.abspath(base_dir / Path(file_part).expanduser()) + dataset


def _unusable(text: str, row: int, column: str, problems: Problems) -> bool:
    """Record a path cell that cannot name a file at all (NUL, unknown ``~user``)."""
    if "\x00" in text:
        problems.add(row, column, f"{text!r} holds a NUL character; retype the path")
        return True
    try:
        Path(text).expanduser()
    except RuntimeError:  # "~name" of no known user
        problems.add(
            row,
            column,
            f"{text!r} starts with ~ but no home folder is known for it; write the path in "
            "full or relative to the layout's folder",
        )
        return True
    return False


def _exists(resolved: str) -> bool:
    match = _HDF5.match(resolved)
    return os.path.exists(match.group(1) if match else resolved)


def _natural(path: str) -> list:
    return [int(t) if t.isdigit() else t.lower() for t in re.split(r"(\d+)", path)]


def _fov_name(path: str) -> str:
    name = Path(_HDF5.sub(r"\1", path)).name
    for suffix in (".ome.tiff", ".ome.tif"):
        if name.lower().endswith(suffix):
            return name[: -len(suffix)]
    return Path(name).stem or name


def _expand_paths(table: pd.DataFrame, *, base_dir: Path, problems: Problems) -> pd.DataFrame:
    """Resolve ``path``/``reference``/``regions``, expand globs, check that files exist."""
    records = []
    for record in table.to_dict("records"):
        given, row, check = record["path"], record["layout_row"], not record["exclude"]
        record["path_as_given"] = given
        for name in PATH_COLUMNS[1:]:
            if record.get(name) and _unusable(record[name], row, name, problems):
                continue
            if record.get(name):
                record[name] = _resolve(record[name], base_dir)
                if check and not _exists(record[name]):
                    problems.add(
                        row,
                        name,
                        f"{record[name]} does not exist; fix the path "
                        f"(relative to {base_dir}) or leave the cell blank",
                    )
        if not given:
            problems.add(row, "path", "blank; name the recording's file or delete the row")
            records.append(record)
            continue
        if _unusable(given, row, "path", problems):
            records.append(record)
            continue
        resolved = _resolve(given, base_dir)
        if not _GLOB.search(_HDF5.sub(r"\1", given)):
            if check and not _exists(resolved):
                problems.add(
                    row,
                    "path",
                    f"{resolved} does not exist; fix the path (relative "
                    f"to {base_dir}) or set exclude to true",
                )
            records.append({**record, "path": resolved})
            continue
        pattern = _resolve(given, Path(glob.escape(str(base_dir))))  # "[" in folder names
        records.extend(_glob_rows(record, pattern, base_dir=base_dir, problems=problems))
    return pd.DataFrame.from_records(records, columns=[*table.columns, "path_as_given"])


def _glob_rows(record: dict, pattern: str, *, base_dir: Path, problems: Problems) -> list:
    """One record per file matching the glob ``pattern`` (absolute, HDF5 suffix kept)."""
    match = _HDF5.match(pattern)
    file_part, dataset = (match.group(1), match.group(2) or "") if match else (pattern, "")
    found = sorted(glob.glob(file_part, recursive=True), key=_natural)
    if not found:
        if not record["exclude"]:
            problems.add(
                record["layout_row"],
                "path",
                f"{record['path']!r} matches no file in "
                f"{base_dir}; fix the pattern or set exclude to true",
            )
        return [{**record, "path": pattern}]
    names = [_fov_name(path) for path in found]
    if len(set(names)) < len(names):  # same stem in several folders or with several suffixes
        names = [os.path.relpath(path, base_dir) for path in found]
    fovs = names if len(found) > 1 and not record["fov"] else [record["fov"]] * len(found)
    return [
        {**record, "path": path + dataset, "fov": fov}
        for path, fov in zip(found, fovs, strict=True)
    ]


def _recording_ids(table: pd.DataFrame, base_dir: Path, problems: Problems) -> pd.Series:
    """Stable unique id per row; duplicate recordings are reported, not renamed."""
    ids, seen, reported = [], {}, set()
    for record in table.to_dict("records"):
        if record["well"]:
            key = tuple(record[name] for name in _KEY)
            rid = "_".join(_ID_UNSAFE.sub("-", part) for part in key if part)
        else:
            key = ("path", record["path"])
            try:
                rel = Path(record["path"]).relative_to(base_dir).as_posix()
            except ValueError:
                rel = Path(record["path"]).as_posix()
            rid = "rec-" + hashlib.sha1(rel.encode()).hexdigest()[:10]
        if rid in seen:
            _report_duplicate(record, key, seen[rid], problems=problems, reported=reported)
        else:
            seen[rid] = (record["layout_row"], key)
        ids.append(rid)
    return pd.Series(ids, index=table.index, dtype=object)


def _report_duplicate(record, key, first, *, problems: Problems, reported: set) -> None:
    """Report a row whose id is taken by an earlier row, worded by what collides."""
    row, (first_row, first_key) = record["layout_row"], first
    if first_row == row:
        if row not in reported:  # one message for a glob row, however many files
            reported.add(row)
            problems.add(
                row,
                "fov",
                f"the pattern {record['path_as_given']!r} matches several "
                f"files that all get fov {record['fov']!r}; leave fov blank so each "
                "file gets its own (its file name) or list the files on separate rows",
            )
    elif first_key != key:
        problems.add(
            row,
            "plate+well+fov+timepoint",
            f"its recording id is also that of row "
            f"{first_row}; make plate, well, fov and timepoint distinct",
        )
    elif key[0] == "path":
        problems.add(
            row,
            "path",
            f"{record['path']} is also listed in row {first_row}; list "
            "each recording once, or give each row its well",
        )
    else:
        named = ", ".join(f"{n} {v!r}" for n, v in zip(_KEY, key, strict=True) if v)
        problems.add(
            row,
            "plate+well+fov+timepoint",
            f"{named} is also in row {first_row}; give each recording its own fov or timepoint",
        )


def _arrange(table: pd.DataFrame, *, given: list[str]) -> pd.DataFrame:
    """Column order: id, spreadsheet row, the layout's columns, then the added ones."""
    first = ["recording_id", "layout_row", *(c for c in given if c != "layout_row")]
    added = [c for c in table.columns if c not in first]
    return table[[c for c in first if c in table.columns] + added].reset_index(drop=True)
