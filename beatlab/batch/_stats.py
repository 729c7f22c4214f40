"""The statistics of a batch: wells, group comparisons, dose-response, incidence, Z'.

:func:`batch_statistics` decides which tables a layout supports (a control for group tests,
four concentrations for a curve, positive and negative controls for Z') and says why it
leaves the others out, so that the same recordings always give the same set of tables.
"""

from __future__ import annotations

import warnings
from collections.abc import Sequence

import numpy as np
import pandas as pd

from beatlab.batch.wells import aggregate_wells, normalize_wells
from beatlab.errors import BeatlabWarning, InputError
from beatlab.schema import ROW_FIELDS
from beatlab.stats import compare_groups, dose_response_table, incidence_table, plate_z_prime

__all__ = ["STANDARD_METRICS", "STATISTICS_TABLES", "WELL_METRICS", "batch_statistics"]

STANDARD_METRICS = (
    "beat_rate_bpm",
    "duration_90_s",
    "duration_90_fridericia_s",
    "displacement_um",
    "contraction_velocity_um_s",
    "irregular_fraction",
)
"""Metrics normalised and compared between groups by default."""

_METADATA = ("source", "kind", "fps", "frames", "duration_s", "pixel_size_um")
WELL_METRICS = tuple(f.name for f in ROW_FIELDS if f.name not in _METADATA)
"""Columns of ``recordings.csv`` aggregated per well (every result except file metadata)."""

STATISTICS_TABLES = ("wells", "groups", "dose_response", "incidence", "z_prime")
"""The tables :func:`batch_statistics` computes, in the order it computes them."""

_GROUP_COLUMNS = ("condition", "compound", "concentration")
_MIN_CONCENTRATIONS = 4


def _blank(values: pd.Series) -> pd.Series:
    return values.isna() | (values.astype(object).map(str).str.strip() == "")


def _group_columns(wells: pd.DataFrame) -> list[str]:
    """Layout columns that name the groups; ``timepoint`` when there are several."""
    by = [c for c in _GROUP_COLUMNS if c in wells.columns and not _blank(wells[c]).all()]
    if "timepoint" in wells.columns:
        timepoints = wells["timepoint"][~_blank(wells["timepoint"])]
        if timepoints.nunique() > 1:
            by.append("timepoint")
    return by


def _curve_compounds(tested: pd.DataFrame) -> list[str]:
    """Compounds with at least four distinct positive concentrations among the wells."""
    if "compound" not in tested.columns or "concentration" not in tested.columns:
        return []
    concentration = pd.to_numeric(tested["concentration"], errors="coerce")
    treated = tested[(concentration > 0) & ~_blank(tested["compound"])]
    counts = treated.groupby("compound")["concentration"].nunique()
    return sorted(counts.index[counts >= _MIN_CONCENTRATIONS])


def _roles(wells: pd.DataFrame) -> set[str]:
    return set(wells["role"].astype(str)) if "role" in wells.columns else set()


def _wells(recordings: pd.DataFrame, metrics: list[str], skipped: dict) -> pd.DataFrame:
    """Fields of view aggregated to wells; normalised when there is something to normalise to."""
    wells = aggregate_wells(recordings.drop(columns=["warnings"], errors="ignore"),
                            metrics=list(WELL_METRICS))  # fmt: skip
    ok = wells[wells["status"] == "ok"]
    timepoints = ok["timepoint"][~_blank(ok["timepoint"])].nunique() if len(ok) else 0
    if "vehicle" in _roles(ok) or timepoints > 1:
        return normalize_wells(wells, metrics=metrics)
    skipped["normalization"] = (
        "no well with role vehicle and a single timepoint: the wells are not normalised; "
        "mark the vehicle wells with role vehicle in the layout"
    )
    return wells


def _tested(wells: pd.DataFrame) -> pd.DataFrame:
    """Ok wells, without the baseline timepoint (its changes are 0 by definition)."""
    ok = wells[wells["status"] == "ok"]
    if "baseline_timepoint" in ok.columns:
        base = ok["baseline_timepoint"].astype(str)
        ok = ok[(base == "") | (ok["timepoint"].astype(str) != base)]
    return ok.reset_index(drop=True)


def _groups(tested, responses, by, skipped) -> pd.DataFrame | None:
    if "vehicle" not in _roles(tested):
        skipped["groups"] = "no well with role vehicle and status ok: groups need a control"
    elif not by:
        skipped["groups"] = "the layout has no condition, compound or concentration column"
    else:
        return compare_groups(tested, metrics=responses, by=by, block=_block(tested))
    return None


def _block(tested: pd.DataFrame) -> str | None:
    """``"batch"`` when wells come from several differentiation batches (a ``batch`` column).

    Plates need no blocking here: the ``_norm`` columns are already relative to each
    plate's own vehicle wells.
    """
    if "batch" not in tested.columns:
        return None
    batches = tested["batch"].astype(str).replace("", np.nan).dropna().unique()
    return "batch" if len(batches) > 1 else None


def _dose_response(tested, responses, skipped) -> pd.DataFrame | None:
    if not _curve_compounds(tested):
        skipped["dose_response"] = (
            f"no compound has {_MIN_CONCENTRATIONS} or more concentrations above 0"
        )
        return None
    timepoint = "timepoint" in tested.columns and not _blank(tested["timepoint"]).all()
    return dose_response_table(tested, metrics=responses, by=["timepoint"] if timepoint else [])


def _incidence(ok, skipped) -> pd.DataFrame | None:
    by = _group_columns(ok)
    if by:
        return incidence_table(ok, by=by)
    skipped["incidence"] = "the layout has no condition, compound, concentration or timepoint"
    return None


def _z_prime(ok, metrics, skipped) -> pd.DataFrame | None:
    roles = _roles(ok)
    if "positive" in roles and roles & {"negative", "vehicle"}:
        return plate_z_prime(ok, metrics=metrics)
    skipped["z_prime"] = "no wells with role positive and role negative (or vehicle)"
    return None


def batch_statistics(
    recordings: pd.DataFrame, *, metrics: Sequence[str]
) -> tuple[dict[str, pd.DataFrame], dict[str, str]]:
    """Every statistics table the recordings support.

    Parameters
    ----------
    recordings : pandas.DataFrame
        ``recordings.csv`` of a batch (typed).
    metrics : sequence of str
        Numeric metrics to normalise, compare, fit and assess.

    Returns
    -------
    tables : dict of str to pandas.DataFrame
        Some of :data:`STATISTICS_TABLES`: ``wells`` (:func:`aggregate_wells` over
        :data:`WELL_METRICS`, then :func:`normalize_wells` over `metrics` when there are
        vehicle wells or several timepoints), ``groups`` (:func:`compare_groups` of the
        ``<metric>_norm`` columns, grouped by ``condition``, ``compound``, ``concentration``
        and ``timepoint`` where the layout sets them), ``dose_response``
        (:func:`dose_response_table`, by timepoint), ``incidence`` (:func:`incidence_table`)
        and ``z_prime`` (:func:`plate_z_prime` of the raw metrics).
    skipped : dict of str to str
        Why each table (or the normalisation) was left out.

    Notes
    -----
    Tests and fits use the wells with status ok, without the baseline timepoint (whose
    changes are 0 by definition); incidence keeps every timepoint. A layout problem that a
    statistics function reports (:class:`InputError`, e.g. two units for one compound)
    leaves that table out with a :class:`BeatlabWarning`: the recordings are kept.
    """
    metrics, skipped = list(metrics), {}
    tables = {"wells": _wells(recordings, metrics, skipped)}
    if not (tables["wells"]["status"] == "ok").any():
        reason = "no recording was analysed successfully"
        return tables, {**skipped, **dict.fromkeys(STATISTICS_TABLES[1:], reason)}
    normalised = "normalization" not in skipped
    responses = [f"{m}_norm" for m in metrics] if normalised else metrics
    ok = tables["wells"][tables["wells"]["status"] == "ok"].reset_index(drop=True)
    tested = _tested(tables["wells"])
    steps = {
        "groups": lambda: _groups(tested, responses, _group_columns(ok), skipped),
        "dose_response": lambda: _dose_response(tested, responses, skipped),
        "incidence": lambda: _incidence(ok, skipped),
        "z_prime": lambda: _z_prime(ok, metrics, skipped),
    }
    for name, step in steps.items():
        try:
            table = step()
        except InputError as exc:
            skipped[name] = str(exc)
            warnings.warn(f"{name}.csv not written: {exc}", BeatlabWarning, stacklevel=2)
            continue
        if table is not None:
            tables[name] = table
    return tables, skipped
