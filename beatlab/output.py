"""Write an :class:`~beatlab.pipeline.Analysis` as the files of the output contract."""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np

from beatlab.io.writers import atomic_path, write_json

__all__ = ["CAUTION", "save_analysis"]

#: Shown in reports and written into every summary.
CAUTION = (
    "Research use only: not a diagnostic or medical device and not for clinical decisions. "
    "In vitro cardiac-safety conclusions need validated assays under ICH S7B and the ICH "
    "E14/S7B Q&A (2022) and local regulation; contraction metrics are not a qualified "
    "regulatory endpoint on their own."
)


def _write_csv(df, path: Path) -> Path:
    with atomic_path(path) as tmp:
        df.to_csv(tmp, index=False, float_format="%.6g")
    return path


def save_analysis(
    analysis, out_dir: str | os.PathLike, *, figures: bool = True
) -> dict[str, Path]:
    """Write summary.json, beats.csv, trace.csv, average_beat.csv, region files, maps, figures.

    Parameters
    ----------
    analysis : Analysis
        The result of :func:`beatlab.analyze`.
    out_dir : path-like
        Output folder, created if needed. Every file is written atomically.
    figures : bool
        Also draw ``trace.png`` and ``maps.png``.

    Returns
    -------
    dict
        File role -> path.
    """
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    paths: dict[str, Path] = {}
    summary = dict(analysis.summary)
    summary["caution"] = CAUTION
    paths["summary"] = write_json(out / "summary.json", summary)
    paths["beats"] = _write_csv(analysis.beats, out / "beats.csv")
    paths["trace"] = _write_csv(analysis.trace, out / "trace.csv")
    paths["average_beat"] = _write_csv(analysis.average_beat, out / "average_beat.csv")
    paths["regions"] = _write_csv(analysis.regions, out / "regions.csv")
    paths["region_beats"] = _write_csv(analysis.region_beats, out / "region_beats.csv")
    paths["region_traces"] = _write_csv(analysis.region_traces, out / "region_traces.csv")
    arrays = {k: np.asarray(v) for k, v in analysis.maps.items() if isinstance(v, np.ndarray)}
    arrays["mask"] = analysis.mask
    arrays["template_nm"] = analysis.template
    if analysis.region_labels is not None:
        arrays["region_labels"] = analysis.region_labels
    with atomic_path(out / "maps.npz") as tmp:
        with open(tmp, "wb") as fh:
            np.savez_compressed(fh, **arrays)
    paths["maps"] = out / "maps.npz"
    if figures:
        px_um = analysis.summary["metadata"]["analysis_pixel_size_um"]
        from beatlab.plots import save_figure
        from beatlab.plots.maps import plot_maps
        from beatlab.plots.trace import plot_trace

        paths["trace_png"] = save_figure(
            lambda ax: plot_trace(analysis.trace, analysis.beats, ax=ax),
            out / "trace.png",
            size=(7.0, 3.0),
        )
        paths["maps_png"] = save_figure(
            lambda fig: plot_maps(
                analysis.maps, analysis.template, analysis.mask, fig=fig, pixel_size_um=px_um
            ),
            out / "maps.png",
            size=(9.0, 3.0),
            whole_figure=True,
        )
    return paths
