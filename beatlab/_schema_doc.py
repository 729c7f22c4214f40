"""Render ``docs/outputs.md`` from :mod:`beatlab.schema` (private)."""

from __future__ import annotations

import re

from beatlab.schema import (
    FILES,
    INTRO,
    MAP_FIELDS,
    METADATA_FIELDS,
    PROPAGATION_FIELDS,
    QUALITY_FIELDS,
    ROW_FIELDS,
    ROW_TEXT,
    SECTIONS,
    SUMMARY_FIELDS,
    TABLES,
    Field,
    heading_anchor,
)

__all__ = ["render"]

_SEE = re.compile(r"\(see ([^)]+)\)")


def _table_md(fields: tuple[Field, ...], head: str = "column") -> list[str]:
    lines = [f"| {head} | unit | definition |", "|---|---|---|"]
    for f in fields:
        meaning = f.meaning.replace("|", "\\|")
        meaning = _SEE.sub(lambda m: f"(see [{m[1]}](#{heading_anchor(m[1])}))", meaning)
        lines.append(f"| `{f.name}` | {f.unit} | {meaning} |")
    return lines


def render() -> str:
    """The Markdown text of ``docs/outputs.md``, ending with a newline."""
    # imported here: output.py (a writer) may import this module, and not the other way round
    from beatlab.output import CAUTION

    out = ["# Outputs of `beatlab analyze`", "", INTRO, "", "## Files", ""]
    out += ["| file | content |", "|---|---|"]
    out += [f"| `{name}` | {content} |" for name, content in FILES]
    out += [
        "",
        "Figures, their `_plotted.csv` files and `report.html` are not written with "
        "`--no-figures`. Each `<figure>_plotted.csv` has one row per plotted point: `panel`, "
        "`series`, `item` (beat or region), `x`, `y`, `value` (map cells) and the unit of "
        "each (`x_unit`, `y_unit`, `value_unit`).",
    ]
    for table in TABLES.values():
        out += ["", f"## `{table.file}`", "", table.meaning, ""]
        out += _table_md(table.columns)
    out += ["", "## `summary.json`", ""]
    out += [
        "A JSON object with these keys, in this order. The beat and rhythm keys describe the "
        "whole-mask trace; `regions.csv` holds the same keys for each region.",
        "",
    ]
    out += _table_md(SUMMARY_FIELDS, "key")
    for key, fields in (
        ("quality", QUALITY_FIELDS),
        ("propagation", PROPAGATION_FIELDS),
        ("metadata", METADATA_FIELDS),
    ):
        out += ["", f"### `summary.json` `{key}`", ""]
        out += _table_md(fields, "key")
    out += ["", "## `maps.npz`", ""]
    out += ["NumPy arrays (`numpy.load`); the shape opens each definition.", ""]
    out += _table_md(MAP_FIELDS, "array")
    out += ["", "## One row per recording", "", ROW_TEXT, ""]
    out += _table_md(ROW_FIELDS)
    for title, text in SECTIONS:
        out += ["", f"## {title}", "", text]
    out += ["", "## Research use", "", CAUTION]
    return "\n".join(out) + "\n"
