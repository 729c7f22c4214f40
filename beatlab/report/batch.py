"""The report of a batch folder: the experiment, its statistics, quality and every recording."""

from __future__ import annotations

import os
from dataclasses import dataclass, field
from pathlib import Path

import pandas as pd

from beatlab._version import __version__
from beatlab.report import _batch_tables as stats
from beatlab.report._figures import batch_figures, recording_figures
from beatlab.report._format import MISSING, as_float, format_number, is_missing
from beatlab.report._html import (
    Html,
    badge,
    cards,
    element,
    join,
    key_values,
    page,
    table,
    write_document,
)
from beatlab.report._parts import (
    check_folder,
    created_text,
    footer,
    headline_cards,
    report_target,
    section,
    settings_block,
)
from beatlab.report._read import first_line, flatten_summary, read_csv, read_json, safe_name
from beatlab.schema import ROW_FIELDS

__all__ = ["build_batch_report"]

TABLE_FILES = ("recordings", "wells", "groups", "dose_response", "incidence", "z_prime")
"""Tables of a batch folder the report reads (``<name>.csv``)."""

_BATCH_COLUMNS = {
    "recording_id", "layout_row", "path", "concentration_as_given", "unit_as_given",
    "n_beating_regions", "mixed", "quality_flags", "measured_region", "status", "error",
    "warnings",
}  # fmt: skip
_RESULT_COLUMNS = {f.name for f in ROW_FIELDS} | _BATCH_COLUMNS


#: Figures of each recording's section in a batch report (all are in its folder).
RECORDING_SECTION_FIGURES = ("trace", "average_beat")


@dataclass
class _Batch:
    folder: Path
    info: dict
    tables: dict = field(default_factory=dict)
    notes: dict = field(default_factory=dict)

    def note(self, name: str) -> str:
        """Why a table is missing: batch.json's reason, else the reading problem."""
        skipped = self.info.get("skipped")
        if isinstance(skipped, dict) and not is_missing(skipped.get(name)):
            return str(skipped[name])
        return self.notes.get(name, f"{name}.csv not found")


def _load(folder: Path) -> _Batch:
    loaded = read_json(folder / "batch.json")
    batch = _Batch(folder, loaded.data or {})
    batch.notes["batch"] = loaded.note
    for name in TABLE_FILES:
        table = read_csv(folder / f"{name}.csv")
        batch.tables[name], batch.notes[name] = table.data, table.note
    return batch


def _values(frame: pd.DataFrame | None, column: str) -> list[str]:
    if frame is None or column not in frame.columns:
        return []
    return sorted({str(v) for v in frame[column] if not is_missing(v)})


def _compounds(recordings: pd.DataFrame | None) -> list[str]:
    """Each compound with its concentrations: ``E4031 (0.1, 1 uM)``."""
    if recordings is None or "compound" not in recordings.columns:
        return []
    items = []
    for name in _values(recordings, "compound"):
        rows = recordings[recordings["compound"] == name]
        values = {v for v in rows.get("concentration", []) if not is_missing(v)}
        numbers = sorted(as_float(v) for v in values if as_float(v) == as_float(v))
        texts = sorted(str(v) for v in values if as_float(v) != as_float(v))
        concentrations = [f"{v:g}" for v in numbers] + texts
        unit = next((u for u in rows.get("unit", []) if not is_missing(u)), "")
        items.append(f"{name} ({', '.join(concentrations)} {unit})".replace(" )", ")")
                     if concentrations else name)  # fmt: skip
    return items


def _ok_wells(wells: pd.DataFrame | None) -> int | None:
    if wells is None:
        return None
    return int((wells["status"] == "ok").sum()) if "status" in wells.columns else len(wells)


def _overview(batch: _Batch) -> Html:
    recordings = batch.tables["recordings"]
    parts = []
    state = batch.info.get("state")
    if state not in (None, "finished"):
        text = f"The batch did not finish (state: {state}): the tables may be incomplete. "
        parts.append(element("p", text + "Run beatlab batch again.", cls="alert"))
    if batch.notes["batch"]:
        parts.append(element("p", f"No run information: {batch.notes['batch']}.", cls="note"))
    if recordings is not None and "status" in recordings.columns:
        status = recordings["status"].value_counts()
        counts = {k: int(status.get(k, 0)) for k in ("ok", "error", "excluded")}
    else:
        counts = {k: batch.info.get("counts", {}).get(k) for k in ("ok", "error", "excluded")}
    wells = batch.tables["wells"]
    conditions, plates = _values(recordings, "condition"), _values(recordings, "plate")
    compounds = _compounds(recordings)
    parts.append(cards([
        ("Recordings", format_number(None if recordings is None else len(recordings)), ""),
        ("Analysed ok", format_number(counts["ok"]), ""),
        ("Failed", format_number(counts["error"]), ""),
        ("Excluded", format_number(counts["excluded"]), ""),
        ("Wells ok", format_number(_ok_wells(wells)), ""),
        ("Plates", str(len(plates)), ""),
        ("Conditions", str(len(conditions)), ""),
        ("Compounds", str(len(compounds)), ""),
    ]))  # fmt: skip
    listed = [("Plates", plates), ("Conditions", conditions), ("Compounds", compounds)]
    parts.append(key_values((name, ", ".join(items) or MISSING) for name, items in listed))
    if recordings is None:
        parts.append(element("p", f"No recording table: {batch.note('recordings')}.", cls="note"))
    else:
        parts.append(_failures(recordings))
    return join(parts)


def _failures(recordings: pd.DataFrame) -> Html:
    status = recordings.get("status", pd.Series("", index=recordings.index))
    file_column = "path_as_given" if "path_as_given" in recordings.columns else "path"
    parts = []
    failed = recordings[status == "error"]
    if failed.empty:
        parts.append(element("p", "No recording failed.", cls="note"))
    else:
        rows = [
            [
                str(r.get("recording_id", "")),
                str(r.get(file_column, "")),
                first_line(r.get("error", "")),
            ]
            for _, r in failed.iterrows()
        ]
        parts.append(element("h3", f"Failed recordings ({len(failed)})"))
        parts.append(table(["Recording", "File", "Error"], rows, cls="failures"))
    excluded = recordings[status == "excluded"]
    if not excluded.empty:
        rows = [
            [str(r.get("recording_id", "")), str(r.get(file_column, "")),
             first_line(r.get("exclude_reason", "")) or MISSING]
            for _, r in excluded.iterrows()
        ]  # fmt: skip
        parts.append(element("h3", f"Excluded by the layout ({len(excluded)})"))
        parts.append(table(["Recording", "File", "Reason"], rows))
    return join(parts)


def _layout_pairs(row: pd.Series) -> list[tuple]:
    pairs = []
    for column, value in row.items():
        if column in _RESULT_COLUMNS or column == "path_as_given" or is_missing(value):
            continue
        pairs.append((element("code", column), str(value)))
    if not is_missing(row.get("path_as_given", "")):
        pairs.insert(0, (element("code", "path"), str(row["path_as_given"])))
    return pairs


def _recording_entry(batch: _Batch, rid: str, row: dict, layout: list[tuple]) -> Html:
    status = str(row.get("status", "")) or "ok"
    kind = status if status in ("ok", "error", "excluded") else "excluded"
    describe = [str(row[c]) for c in ("plate", "well", "fov", "condition", "compound", "timepoint")
                if not is_missing(row.get(c))]  # fmt: skip
    if not is_missing(row.get("beat_rate_bpm")):
        describe.append(f"{format_number(row['beat_rate_bpm'])} bpm")
    flags = [] if is_missing(row.get("quality_flags")) else str(row["quality_flags"]).split(";")
    summary = (
        element("span", rid, cls="id")
        + badge(status, kind=kind)
        + element("span", " · ".join(describe), cls="meta")
        + join(Html(" ") + badge(f.strip(), kind="flag") for f in flags if f.strip())
    )
    inner = []
    if status == "error":
        inner.append(element("p", first_line(row.get("error", "")), cls="alert"))
    if status == "excluded" and not is_missing(row.get("exclude_reason")):
        inner.append(element("p", f"Excluded: {first_line(row['exclude_reason'])}", cls="note"))
    if status == "ok":
        inner.append(headline_cards(row))
    if layout:
        names, values = zip(*layout, strict=True)
        inner.append(table(names, [values], cls="layout"))
    warnings = [w.strip() for w in str(row.get("warnings") or "").split(";") if w.strip()]
    if warnings and not is_missing(row.get("warnings")):
        inner.append(element("ul", join(element("li", w) for w in warnings), cls="note"))
    name = safe_name(rid)
    if name is not None and (batch.folder / "recordings" / name).is_dir():
        # the trace and the average beat, on screen density: a plate's report stays small;
        # every figure is in the recording's folder
        inner.append(recording_figures(batch.folder / "recordings" / name,
                                       prefix=f"recordings/{name}/", subject=rid,
                                       stems=RECORDING_SECTION_FIGURES, density=1))  # fmt: skip
    body = element("div", join(inner), cls="inner")
    return element("details", element("summary", summary) + body, cls="block recording")


def _recordings(batch: _Batch) -> Html:
    entries, seen = [], set()
    recordings = batch.tables["recordings"]
    if recordings is not None and "recording_id" in recordings.columns:
        for _, row in recordings.iterrows():
            rid = str(row["recording_id"])
            seen.add(rid)
            entries.append(_recording_entry(batch, rid, row.to_dict(), _layout_pairs(row)))
    folder = batch.folder / "recordings"
    extra = sorted(p for p in folder.iterdir() if p.is_dir()) if folder.is_dir() else []
    for path in extra:
        if path.name in seen:
            continue
        summary = read_json(path / "summary.json").data or {}
        entries.append(_recording_entry(batch, path.name, flatten_summary(summary), []))
    if not entries:
        return element("p", f"No recordings to show: {batch.note('recordings')}.", cls="note")
    intro = element("p", "Open a recording for its numbers, layout cells and figures.", cls="note")
    return intro + join(entries)


def _provenance(batch: _Batch, created: str) -> Html:
    info = batch.info
    run = info.get("run") if isinstance(info.get("run"), dict) else {}
    pairs = [
        ("Batch analysed with beatlab", format_number(info.get("beatlab_version"))),
        ("Report made with beatlab", __version__),
        ("Report created", created),
        ("Batch folder", str(batch.folder)),
        ("Layout", format_number(info.get("layout"))),
        ("State", format_number(info.get("state"))),
        *((f"Run: {key}", value) for key, value in run.items()),
        ("Metrics compared", ", ".join(map(str, info.get("metrics") or [])) or MISSING),
        ("Tables written", ", ".join(map(str, info.get("tables") or [])) or MISSING),
    ]
    skipped = info.get("skipped") if isinstance(info.get("skipped"), dict) else {}
    pairs += [(f"Not computed: {name}", str(reason)) for name, reason in skipped.items()]
    config = info.get("config") or {}
    return key_values(pairs) + settings_block(config, title="Configuration (batch.json)")


def _sections(batch: _Batch, created: str) -> list[tuple[str, str, Html]]:
    t = batch.tables
    metrics = stats.key_metrics(t["wells"], t["groups"], note=batch.note("wells"))
    metrics += stats.comparisons(t["groups"], note=batch.note("groups"))
    quality = element("h3", "Quality flags per recording")
    quality += stats.quality_flags(t["recordings"], note=batch.note("recordings"))
    quality += element("h3", "Assay window (Z')") + stats.z_prime(
        t["z_prime"], note=batch.note("z_prime")
    )
    quality += element("h3", "Incidence of events") + stats.incidence(
        t["incidence"], note=batch.note("incidence")
    )
    figures = batch_figures(batch.folder / "figures") or element(
        "p", "No figures in figures/.", cls="note missing"
    )
    return [
        ("overview", "Experiment", _overview(batch)),
        ("metrics", "Metrics by group", metrics),
        ("dose-response", "Dose-response", stats.dose_response(
            t["dose_response"], note=batch.note("dose_response"))),
        ("quality", "Quality control", quality),
        ("figures", "Figures", figures),
        ("recordings", "Recordings", _recordings(batch)),
        ("provenance", "Provenance", _provenance(batch, created)),
    ]  # fmt: skip


def build_batch_report(batch_dir: str | os.PathLike, *, out=None) -> Path:
    """Write the HTML report of a batch folder written by ``beatlab batch``.

    Parameters
    ----------
    batch_dir : path-like
        The batch folder: ``recordings.csv``, ``wells.csv``, ``groups.csv``,
        ``dose_response.csv``, ``incidence.csv``, ``z_prime.csv``, ``batch.json``, figures in
        ``figures/*.png`` and per-recording folders ``recordings/<recording_id>/``; whatever is
        missing is left out with a note.
    out : path-like, optional
        The report file, or a folder to hold ``report.html``; default
        ``batch_dir/report.html``.

    Returns
    -------
    Path
        The report: one self-contained HTML file (inline stylesheet, figures as base64 PNG,
        no scripts, no external resources), written atomically. Sections: the experiment
        (counts, plates, conditions, compounds, failures), metrics by group (mean ± SD,
        n wells, p_adj), dose-response fits, quality control (flags, Z', incidence), figures,
        one collapsible block per recording, provenance; the research-use caution in the
        footer.

    Raises
    ------
    InputError
        If the folder does not exist or holds neither ``recordings.csv`` nor ``batch.json``.

    Examples
    --------
    >>> build_batch_report("screen")  # doctest: +SKIP
    PosixPath('screen/report.html')
    """
    folder = check_folder(batch_dir, needs=("recordings.csv", "batch.json"),
                          what="a batch folder", command="beatlab batch --out")  # fmt: skip
    batch = _load(folder)
    created = created_text()
    sections = _sections(batch, created)
    counts = batch.tables["recordings"]
    n = MISSING if counts is None else str(len(counts))
    subtitle = f"{folder.name} · {n} recordings · created {created}"
    document = page(
        title="Batch report",
        subtitle=subtitle,
        nav=[(anchor, title) for anchor, title, _ in sections],
        body=join(section(anchor, title, content) for anchor, title, content in sections),
        footer=footer(wrote=f"the batch folder {folder.name}", created=created),
    )
    return write_document(document, report_target(folder, out))
