"""Writing a simulated recording and its ground truth to disk."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from beatlab.errors import InputError
from beatlab.io.writers import atomic_path, write_json, write_ome_tiff
from beatlab.synth._simulate import SyntheticRecording

__all__ = ["write_simulation"]

_SUFFIXES = (".ome.tiff", ".ome.tif", ".tiff", ".tif")


def write_simulation(sim: SyntheticRecording, path) -> dict[str, Path]:
    """Write a simulated recording as OME-TIFF with its ground truth beside it.

    Parameters
    ----------
    sim : SyntheticRecording
    path : path-like
        Output recording, ending in ``.ome.tif`` (or ``.tif``/``.tiff``). Beside it go
        ``<stem>.truth.json``, ``<stem>.truth.npz`` (per-frame true traces, activation, mask,
        labels, unit field, stage shift, rest scene) and, for holograms,
        ``<stem>.reference.ome.tif``.

    Returns
    -------
    dict of str to Path
        Keys ``recording``, ``truth``, ``truth_arrays`` and (holograms) ``reference``.

    Raises
    ------
    InputError
        ``path`` does not end in a TIFF suffix.
    """
    path = Path(path)
    name = path.name
    suffix = next((s for s in _SUFFIXES if name.lower().endswith(s)), None)
    if suffix is None:
        raise InputError(f"path: expected a name ending in .ome.tif, got {name!r}; add .ome.tif")
    stem = name[: -len(suffix)]
    out = {
        "recording": path,
        "truth": path.with_name(stem + ".truth.json"),
        "truth_arrays": path.with_name(stem + ".truth.npz"),
    }
    if sim.reference_frames is not None:
        out["reference"] = path.with_name(stem + ".reference.ome.tif")
    extra = {"simulated": "true", "phase_wrapped": str(bool(sim.phase_wrapped)).lower()}
    write_ome_tiff(
        path,
        sim.frames,
        fps=sim.fps,
        pixel_size_um=sim.pixel_size_um,
        kind=sim.kind,
        wavelength_nm=sim.wavelength_nm,
        extra=extra,
    )
    if sim.reference_frames is not None:
        write_ome_tiff(
            out["reference"],
            sim.reference_frames,
            fps=sim.fps,
            pixel_size_um=sim.pixel_size_um,
            kind="hologram",
            wavelength_nm=sim.wavelength_nm,
            extra={"simulated": "true", "reference": "true"},
        )
    activation = sim.activation if sim.activation.ndim == 2 else sim.activation[None, :]
    with atomic_path(out["truth_arrays"]) as tmp, open(tmp, "wb") as fh:
        np.savez_compressed(
            fh,
            times_s=sim.times_s,
            displacement_um=sim.displacement_um,
            region_displacement_um=sim.region_displacement_um,
            activation=activation,
            mask=sim.mask,
            cluster_labels=sim.cluster_labels,
            displacement_field_um=sim.displacement_field_um,
            stage_shift_um=sim.stage_shift_um,
            rest_opd_nm=sim.rest_opd_nm,
        )
    truth = dict(sim.truth)
    truth["files"] = {k: v.name for k, v in out.items()}
    write_json(out["truth"], truth)
    return out
