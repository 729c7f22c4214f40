"""Spatial maps: rest template, peak displacement per tile, local onset delay."""

from __future__ import annotations

import numpy as np

__all__ = ["plot_displacement_map", "plot_maps", "plot_onset_map"]


def _extent(maps, shape_px, pixel_size_um):
    ny, nx = shape_px
    return (0, nx * pixel_size_um, ny * pixel_size_um, 0)


def plot_displacement_map(maps: dict, *, ax=None, extent=None):
    """Peak displacement amplitude per tile (um), non-beating tiles hatched out."""
    if ax is None:
        import matplotlib.pyplot as plt

        ax = plt.figure().add_subplot()
    amp = np.asarray(maps["peak_displacement_um"], dtype=float)
    im = ax.imshow(amp, cmap="viridis", extent=extent, interpolation="nearest")
    ax.figure.colorbar(im, ax=ax, label="peak displacement (µm)", shrink=0.8)
    ax.set_title(f"beating area {100 * maps['beating_area_fraction']:.0f} %")
    return ax


def plot_onset_map(maps: dict, *, ax=None, extent=None):
    """Local onset delay relative to the global onset (ms), with the propagation verdict."""
    if ax is None:
        import matplotlib.pyplot as plt

        ax = plt.figure().add_subplot()
    delay = np.asarray(maps["onset_delay_s"], dtype=float) * 1e3
    im = ax.imshow(delay, cmap="coolwarm", extent=extent, interpolation="nearest")
    ax.figure.colorbar(im, ax=ax, label="onset delay (ms)", shrink=0.8)
    prop = maps.get("propagation", {})
    if prop.get("resolved"):
        ax.set_title(f"{prop['speed_cm_s']:.1f} cm/s at {prop['direction_deg']:.0f}°")
    else:
        ax.set_title("propagation not resolved")
    return ax


def plot_maps(
    maps: dict, template_nm: np.ndarray, mask: np.ndarray, *, fig=None, pixel_size_um: float = 1.0
):
    """Three panels: template with mask outline, displacement map, onset map."""
    if fig is None:
        import matplotlib.pyplot as plt

        fig = plt.figure(figsize=(9, 3))
    axes = fig.subplots(1, 3)
    extent = _extent(maps, template_nm.shape, pixel_size_um)
    im = axes[0].imshow(template_nm, cmap="gray", extent=extent)
    axes[0].contour(
        mask, levels=[0.5], colors="#E69F00", linewidths=0.6, extent=extent, origin="upper"
    )
    fig.colorbar(im, ax=axes[0], label="OPD (nm)", shrink=0.8)
    axes[0].set_title("rest template and mask")
    plot_displacement_map(maps, ax=axes[1], extent=extent)
    plot_onset_map(maps, ax=axes[2], extent=extent)
    for ax in axes:
        ax.set_xlabel("x (µm)")
    axes[0].set_ylabel("y (µm)")
    return fig
