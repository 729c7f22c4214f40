"""Per-recording result cache of a batch: one JSON file per finished recording.

A batch stores each recording as soon as it finishes, under a key that changes whenever
anything that could change its result changes: the file (resolved path, size, modification
time), the layout row's overrides, the full analysis configuration and the beatlab version.
A re-run, or the run after an interrupted one, therefore analyses only what is missing or
changed; failed recordings are never stored, so a re-run retries them.
"""

from __future__ import annotations

import hashlib
import json
import logging
import os
from collections.abc import Mapping
from pathlib import Path

import pandas as pd

from beatlab._version import __version__
from beatlab.io.writers import atomic_path, json_ready

__all__ = ["ResultCache", "decode_frame", "encode_frame", "file_identity", "recording_key"]

logger = logging.getLogger(__name__)

_FORMAT = 1
_PATH_OPTIONS = ("reference", "regions")  # overrides naming files: their content counts too


def _split_dataset(path: str) -> str:
    """The file part of ``file.h5:/dataset`` (paths that exist are returned unchanged)."""
    if os.path.exists(path) or ":/" not in path:
        return path
    return path.rsplit(":/", 1)[0]


def file_identity(path: str | os.PathLike) -> dict:
    """What identifies the content of a recording file without reading it.

    Parameters
    ----------
    path : path-like
        A file, a folder of frame images, or ``file.h5:/dataset``.

    Returns
    -------
    dict
        ``path`` (resolved, with any ``:/dataset`` suffix), and ``size_bytes`` and
        ``mtime_ns`` of the file; for a folder, ``files``: ``[name, size_bytes, mtime_ns]`` of
        each file in it (a changed frame changes the identity); ``missing: True`` when
        nothing is there.
    """
    text = os.fspath(path)
    file_part = _split_dataset(text)
    resolved = os.path.realpath(file_part) + text[len(file_part) :]
    identity: dict = {"path": resolved}
    try:
        if os.path.isdir(file_part):
            with os.scandir(file_part) as entries:
                stats = [(e.name, e.stat()) for e in entries if e.is_file()]
            identity["files"] = sorted([n, s.st_size, s.st_mtime_ns] for n, s in stats)
        else:
            stat = os.stat(file_part)
            identity.update(size_bytes=stat.st_size, mtime_ns=stat.st_mtime_ns)
    except OSError:
        identity["missing"] = True
    return identity


def recording_key(
    path: str | os.PathLike,
    *,
    options: Mapping,
    config: Mapping,
    version: str = __version__,
) -> str:
    """The cache key of one recording: SHA-256 of everything its result depends on.

    Parameters
    ----------
    path : path-like
        The recording (see :func:`file_identity`).
    options : Mapping
        The keyword overrides passed to :func:`beatlab.analyze` (``fps``, ``kind``,
        ``reference``, ...); files named by ``reference`` and ``regions`` enter by identity.
    config : Mapping
        The full nested configuration (``Settings.to_dict()``).
    version : str
        beatlab version.

    Returns
    -------
    str
        64 hexadecimal digits.
    """
    named = {
        name: file_identity(value) if name in _PATH_OPTIONS else value
        for name, value in options.items()
    }
    material = {
        "recording": file_identity(path),
        "options": named,
        "config": config,
        "version": version,
    }
    text = json.dumps(json_ready(material), sort_keys=True, allow_nan=False)
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def encode_frame(frame: pd.DataFrame) -> dict:
    """A DataFrame as JSON-ready ``columns``, ``dtypes`` and row ``data``; floats exact.

    JSON numbers keep every bit of a float (Python writes the shortest repr that reads back
    the same), so :func:`decode_frame` returns an equal frame with the same dtypes.
    """
    values = frame.astype(object).where(frame.notna(), None)
    return {
        "columns": [str(c) for c in frame.columns],
        "dtypes": [str(t) for t in frame.dtypes],
        "data": json_ready(values.to_numpy().tolist()),
    }


def decode_frame(data: Mapping) -> pd.DataFrame:
    """The DataFrame of :func:`encode_frame`."""
    frame = pd.DataFrame(list(data["data"]), columns=list(data["columns"]), dtype=object)
    if frame.empty:
        frame = pd.DataFrame({c: [] for c in data["columns"]}, dtype=object)
    return frame.astype(dict(zip(data["columns"], data["dtypes"], strict=True)))


class ResultCache:
    """Finished recordings of a batch, one JSON file each, under ``folder/results``.

    Parameters
    ----------
    folder : path-like
        The cache folder (``DIR/cache`` of a batch); created when the first entry is stored.
    """

    def __init__(self, folder: str | os.PathLike) -> None:
        self.folder = Path(folder)

    def path_for(self, key: str) -> Path:
        """The file of one entry."""
        return self.folder / "results" / f"{key}.json"

    def load(self, key: str) -> tuple[dict, pd.DataFrame] | None:
        """The stored ``(row, beats)`` of ``key``, or None when absent or unreadable."""
        path = self.path_for(key)
        try:
            document = json.loads(path.read_text(encoding="utf-8"))
            if document.get("format") != _FORMAT:
                return None
            return dict(document["row"]), decode_frame(document["beats"])
        except FileNotFoundError:
            return None
        except (OSError, ValueError, KeyError, TypeError) as exc:  # treated as a miss
            logger.debug("ignoring unreadable cache entry %s: %s", path, exc)
            return None

    def store(
        self, key: str, row: Mapping, beats: pd.DataFrame, *, inputs: Mapping | None = None
    ) -> tuple[dict, pd.DataFrame]:
        """Store one finished recording atomically; return it as :meth:`load` will.

        Parameters
        ----------
        key : str
            From :func:`recording_key`.
        row : Mapping
            The recording's row (``Analysis.to_row()`` plus batch columns).
        beats : pandas.DataFrame
            Its beats table.
        inputs : Mapping, optional
            What the key was made of, kept in the file for people who read it.

        Returns
        -------
        tuple of (dict, pandas.DataFrame)
            ``row`` and ``beats`` after the round trip through JSON, so that a fresh result
            and a cached one are identical to the last bit and dtype.
        """
        document = {
            "format": _FORMAT,
            "beatlab_version": __version__,
            "inputs": dict(inputs or {}),
            "row": dict(row),
            "beats": encode_frame(beats),
        }
        text = json.dumps(json_ready(document), allow_nan=False)
        path = self.path_for(key)
        with atomic_path(path) as tmp:
            tmp.write_text(text, encoding="utf-8")
        stored = json.loads(text)
        return stored["row"], decode_frame(stored["beats"])
