"""Read the files a report shows, never failing on one that is missing or damaged.

Tables are read as text (``dtype=str``, no NA guessing), so a cell reaches the page exactly as
the file holds it; numbers are converted where a section computes with them.
"""

from __future__ import annotations

import json
import os
from dataclasses import dataclass
from pathlib import Path

import pandas as pd

__all__ = ["Loaded", "first_line", "flatten_summary", "read_csv", "read_json", "safe_name"]


@dataclass(frozen=True)
class Loaded:
    """A file's content, or why there is none.

    Attributes
    ----------
    data : pandas.DataFrame, dict or None
        The table (all cells as text) or the JSON object; None when missing or unreadable.
    note : str
        Empty when read; else one line for the reader (``wells.csv not found``).
    """

    data: object
    note: str = ""


def read_csv(path: str | os.PathLike) -> Loaded:
    """A CSV table with every cell as text (empty cells as ``""``).

    Parameters
    ----------
    path : path-like
        The file.

    Returns
    -------
    Loaded
        ``data`` None with a note when the file is missing or cannot be parsed.
    """
    path = Path(path)
    if not path.is_file():
        return Loaded(None, f"{path.name} not found")
    try:
        table = pd.read_csv(path, dtype=str, keep_default_na=False, encoding="utf-8")
    except pd.errors.EmptyDataError:
        return Loaded(None, f"{path.name} is empty")
    except (OSError, ValueError, UnicodeDecodeError) as exc:
        return Loaded(None, f"{path.name} could not be read ({first_line(str(exc))})")
    return Loaded(table)


def read_json(path: str | os.PathLike) -> Loaded:
    """A JSON object; a note instead when the file is missing, unreadable or not an object."""
    path = Path(path)
    if not path.is_file():
        return Loaded(None, f"{path.name} not found")
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError, UnicodeDecodeError) as exc:
        return Loaded(None, f"{path.name} could not be read ({first_line(str(exc))})")
    if not isinstance(data, dict):
        return Loaded(None, f"{path.name} does not hold a JSON object")
    return Loaded(data)


def first_line(text) -> str:
    """The first non-blank line of a message, stripped (an error shown on one line)."""
    for line in str(text).splitlines():
        if line.strip():
            return line.strip()
    return ""


def safe_name(name) -> str | None:
    """The name when it is one plain path component (no separators, not ``.``/``..``)."""
    text = str(name)
    if not text or text in (".", "..") or "/" in text or "\\" in text or "\x00" in text:
        return None
    return text


def flatten_summary(summary: dict) -> dict:
    """The scalar keys of a summary.json, with ``quality`` keys prefixed ``quality_``.

    Parameters
    ----------
    summary : dict
        The content of ``summary.json``.

    Returns
    -------
    dict
        Top-level scalars, ``quality_<key>`` for the scalar quality keys, ``n_warnings``, and the
        scalar metadata keys (``fps``, ``frames``, ...) where they do not clash: the same names
        as a row of ``recordings.csv``.
    """
    row = {k: v for k, v in summary.items() if not isinstance(v, (dict, list))}
    quality = summary.get("quality")
    if isinstance(quality, dict):
        row.update(
            {f"quality_{k}": v for k, v in quality.items() if not isinstance(v, (dict, list))}
        )
    metadata = summary.get("metadata")
    if isinstance(metadata, dict):
        for key, value in metadata.items():
            if not isinstance(value, (dict, list)):
                row.setdefault(key, value)
    if isinstance(summary.get("warnings"), list):
        row["n_warnings"] = len(summary["warnings"])
    return row
