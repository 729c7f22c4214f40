"""The result of one recording: :class:`Analysis`, its files, and reading them back.

:meth:`Analysis.save` writes the files of the output contract (``docs/outputs.md``);
:func:`read_analysis` reads a finished output folder back into the same object, and
:meth:`Analysis.to_row` gives the one flat row of recording-level metrics that batch tables
aggregate.
"""

from __future__ import annotations

import json
import os
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from beatlab.errors import InputError
from beatlab.schema import ROW_FIELDS, TABLES

__all__ = ["Analysis", "beating_regions", "read_analysis"]

#: A region beats on its own when its trace has at least this many beats.
MIN_REGION_BEATS = 2


def beating_regions(regions: pd.DataFrame) -> pd.DataFrame:
    """The rows of a regions table whose region beats (at least 2 beats), largest first.

    Parameters
    ----------
    regions : pandas.DataFrame
        ``regions.csv`` (columns ``region``, ``area_um2``, ``beat_count``, ...).

    Returns
    -------
    pandas.DataFrame
        The beating regions, by decreasing area.
    """
    if not len(regions) or "beat_count" not in regions:
        return regions.iloc[:0]
    count = pd.to_numeric(regions["beat_count"], errors="coerce")
    beating = regions[count >= MIN_REGION_BEATS]
    return beating.sort_values("area_um2", ascending=False, kind="stable")


def _rate_text(rate) -> str:
    return "n/a" if rate is None or not np.isfinite(float(rate)) else f"{float(rate):.1f} bpm"


#: Arrays of ``maps.npz`` that are not maps.
_IMAGES = {"mask": "mask", "template_nm": "template", "region_labels": "region_labels"}
#: Scalars and dicts of ``Analysis.maps`` that live in ``summary.json``.
_MAP_SUMMARY_KEYS = ("beating_area_fraction", "propagation")


@dataclass(frozen=True)
class Analysis:
    """The result of analysing one recording.

    Attributes
    ----------
    trace : pandas.DataFrame
        One row per frame: ``time_s``, ``displacement_um``, ``velocity_um_s``,
        ``opd_change_nm``, ``drift_x_um``, ``drift_y_um``.
    beats : pandas.DataFrame
        One row per beat, the columns of ``beats.csv``.
    summary : dict
        Recording-level results, quality, metadata used, parameters and warnings
        (JSON-ready; the keys of ``summary.json``).
    average_beat : pandas.DataFrame
        Ensemble-average beat aligned at onset (``time_s``, ``n_beats``, mean and SD of each
        trace).
    maps : dict
        Spatial maps (arrays on the tile grid), ``beating_area_fraction`` and
        ``propagation``.
    regions : pandas.DataFrame
        One row per independently beating region.
    region_beats, region_traces : pandas.DataFrame
        Per-beat rows with a ``region`` column; per-frame traces per region (long format).
    mask : ndarray of bool (Y, X)
        The analysis mask.
    template : ndarray (Y, X)
        The rest template (nm).
    region_labels : ndarray of int (Y, X)
        Region of each pixel (0: none).

    See ``docs/outputs.md`` for every column and key with its unit and definition.
    """

    trace: pd.DataFrame
    beats: pd.DataFrame
    summary: dict
    average_beat: pd.DataFrame
    maps: dict
    regions: pd.DataFrame
    region_beats: pd.DataFrame
    region_traces: pd.DataFrame
    mask: np.ndarray = field(repr=False)
    template: np.ndarray = field(repr=False)
    region_labels: np.ndarray = field(repr=False)

    @property
    def warnings(self) -> list[str]:
        """Every warning raised while analysing (also in ``summary["warnings"]``)."""
        return list(self.summary.get("warnings", []))

    def save(
        self,
        out_dir: str | os.PathLike,
        *,
        figures: bool = True,
        figure_formats: tuple[str, ...] = ("png", "svg"),
        workers: int = 1,
        figure_process=None,
        shown_as: str | os.PathLike | None = None,
    ) -> dict[str, Path]:
        """Write the output files into ``out_dir`` (created if needed), each atomically.

        Parameters
        ----------
        out_dir : path-like
            The output folder.
        figures : bool
            Draw the figures (each with the CSV of what it plots).
        figure_formats : tuple of str
            File formats of each figure.
        workers : int
            Figures drawn at once (forked processes on Linux; 1: one after another here).
        figure_process : beatlab._figure_process.FigureProcess, optional
            A figure process started before the analysis; it draws the figures and the
            report (the same files, with matplotlib loaded ahead of time).
        shown_as : path-like, optional
            The folder as ``report.html`` names it (default: ``out_dir``): the final folder
            when ``out_dir`` is a temporary one renamed once complete.

        Returns
        -------
        dict
            File role -> path.
        """
        from beatlab.output import save_analysis

        return save_analysis(
            self, out_dir, figures=figures, figure_formats=figure_formats, workers=workers,
            figure_process=figure_process, shown_as=shown_as,
        )  # fmt: skip

    def headline(self) -> str:
        """One line for people: beats, rate and rhythm, or each region's when several beat.

        When two or more regions beat on their own the whole-field numbers mix their
        rhythms, so the line gives each region's beats, rate and rhythm instead.
        """
        beating = beating_regions(self.regions)
        if len(beating) >= 2:
            parts = [
                f"region {int(r.region)}: {int(r.beat_count)} beats, "
                f"{_rate_text(r.beat_rate_bpm)}, rhythm {r.rhythm}"
                for r in beating.sort_values("region").itertuples()
            ]
            return f"{len(beating)} regions beat on their own ({'; '.join(parts)})"
        s = self.summary
        rate = _rate_text(s.get("beat_rate_bpm"))
        line = f"{s['beat_count']} beats, {rate}, rhythm {s['rhythm']}"
        checks = s.get("quality", {}).get("checks")
        return f"{line} (check: {checks})" if checks else line

    def to_row(self) -> dict:
        """One flat row of recording-level metrics, keyed by ``beatlab.schema.ROW_FIELDS``.

        Metadata (``source``, ``kind``, ``fps``, ...), the beat and rhythm keys of the summary,
        ``beating_area_fraction``, ``n_regions``, the scalar quality keys as ``quality_<key>``
        and ``n_warnings``: the unit that batch tables aggregate.
        """
        s = self.summary
        meta, quality = s.get("metadata", {}), s.get("quality", {})
        row = {}
        for f in ROW_FIELDS:
            if f.name == "n_warnings":
                row[f.name] = len(s.get("warnings", []))
            elif f.name.startswith("quality_"):
                row[f.name] = quality.get(f.name.removeprefix("quality_"))
            elif f.name in s:
                row[f.name] = s[f.name]
            else:
                row[f.name] = meta.get(f.name)
        return row


def _typed(table: pd.DataFrame, name: str) -> pd.DataFrame:
    """Restore the column types a CSV round trip loses (booleans with gaps, integers)."""
    kinds = {f.name: f.dtype for f in TABLES[name].columns}
    out = table.copy()
    for column in out.columns:
        kind = kinds.get(column)
        if kind in ("bool", "boolean"):
            values = out[column].map({True: True, False: False, "True": True, "False": False})
            out[column] = values.astype("boolean" if kind == "boolean" else bool)
        elif kind == "int" and not out[column].isna().any():
            out[column] = out[column].astype(np.int64)
        elif kind == "float" and out[column].dtype == object:
            out[column] = out[column].astype(float)
    return out


def read_analysis(out_dir: str | os.PathLike) -> Analysis:
    """Read a finished analysis folder back into the :class:`Analysis` that wrote it.

    Parameters
    ----------
    out_dir : path-like
        A folder written by :meth:`Analysis.save` (``beatlab analyze --out``).

    Returns
    -------
    Analysis
        Tables, summary, maps, mask, template and region labels as they were analysed.

    Raises
    ------
    InputError
        The folder or one of its files is missing or unreadable.
    """
    out = Path(out_dir)
    if not out.is_dir():
        raise InputError(f"{out} is not a folder; pass the --out folder of beatlab analyze")
    try:
        summary = json.loads((out / "summary.json").read_text(encoding="utf-8"))
        tables = {
            name: _typed(pd.read_csv(out / table.file), name) for name, table in TABLES.items()
        }
        with np.load(out / "maps.npz") as npz:
            arrays = {key: npz[key] for key in npz.files}
    except (OSError, ValueError) as exc:
        raise InputError(
            f"{out} is not a complete beatlab analysis ({exc}); rerun beatlab analyze"
        ) from exc
    images = {attr: arrays.pop(key, None) for key, attr in _IMAGES.items()}
    maps = {**arrays, **{key: summary.get(key) for key in _MAP_SUMMARY_KEYS}}
    return Analysis(
        trace=tables["trace"],
        beats=tables["beats"],
        summary=summary,
        average_beat=tables["average_beat"],
        maps=maps,
        regions=tables["regions"],
        region_beats=tables["region_beats"],
        region_traces=tables["region_traces"],
        **images,
    )
