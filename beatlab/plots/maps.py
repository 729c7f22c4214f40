"""Spatial maps: rest template, peak displacement per tile, onset delay where it means something.

:func:`tabulate_maps` lists the tile values as drawn (``maps_plotted.csv``); :func:`plot_maps`
draws the three panels. The onset-delay map is drawn only when propagation is resolved (else
the panel says why not) and, when several regions beat independently, only within the largest
beating region: delays between independent regions are not a travelling wave.
"""

from __future__ import annotations

import textwrap
from dataclasses import dataclass

import numpy as np
import pandas as pd

from beatlab.errors import InputError
from beatlab.plots.style import (
    PALETTE,
    axis_label,
    concat_rows,
    message_panel,
    plotted_rows,
)
from beatlab.results import beating_regions

__all__ = ["MapGeometry", "delay_region", "map_geometry", "plot_maps", "tabulate_maps"]

#: Smallest tile side in pixels (as in the per-frame pass, ``beatlab.stages.frame_pass``).
_MIN_TILE_PX = 4


@dataclass(frozen=True)
class MapGeometry:
    """Where the tile grid lies on the analysed frame.

    Attributes
    ----------
    pixel_size_um : float
        Analysed pixel size.
    shape_px : (int, int)
        ``(Y, X)`` of the analysed frame.
    tile_px : int
        Tile side in pixels; ``tile_um = tile_px * pixel_size_um``.
    grid : (int, int)
        ``(ny, nx)`` tiles.
    """

    pixel_size_um: float
    shape_px: tuple[int, int]
    tile_px: int
    grid: tuple[int, int]

    @property
    def tile_um(self) -> float:
        """Tile side in um."""
        return self.tile_px * self.pixel_size_um

    @property
    def field_extent_um(self) -> tuple[float, float, float, float]:
        """``imshow`` extent of the frame: (left, right, bottom, top) in um, y down."""
        ny, nx = self.shape_px
        return (0.0, nx * self.pixel_size_um, ny * self.pixel_size_um, 0.0)

    @property
    def grid_extent_um(self) -> tuple[float, float, float, float]:
        """``imshow`` extent of the tile grid (partial edge tiles drawn whole, then cropped)."""
        ny, nx = self.grid
        return (0.0, nx * self.tile_um, ny * self.tile_um, 0.0)

    def tile_centres_um(self) -> tuple[np.ndarray, np.ndarray]:
        """x and y of every tile centre (row-major), ``((ix + 0.5), (iy + 0.5)) x tile_um``."""
        ny, nx = self.grid
        iy, ix = np.mgrid[0:ny, 0:nx]
        return ((ix + 0.5) * self.tile_um).ravel(), ((iy + 0.5) * self.tile_um).ravel()

    def tile_index(self) -> np.ndarray:
        """Tile of every pixel, ``(row // tile_px) * nx + col // tile_px``, shape ``(Y, X)``."""
        rows = np.arange(self.shape_px[0]) // self.tile_px
        cols = np.arange(self.shape_px[1]) // self.tile_px
        return rows[:, None] * self.grid[1] + cols[None, :]


def map_geometry(analysis) -> MapGeometry:
    """The tile grid of an analysis: pixel size, frame shape, tile side and grid shape.

    Parameters
    ----------
    analysis : beatlab.results.Analysis
        Uses ``summary["metadata"]["analysis_pixel_size_um"]``,
        ``summary["parameters"]["maps"]["tile_um"]``, the mask shape and the map grid shape.

    Returns
    -------
    MapGeometry
        ``tile_px = max(4, round(tile_um / pixel size))`` as the analysis used it; if that
        does not give the map's grid (a changed default), the tile side nearest to it that
        does.

    Raises
    ------
    InputError
        No tile side gives the map's grid from the mask's shape.
    """
    px_um = float(analysis.summary["metadata"]["analysis_pixel_size_um"])
    shape = np.shape(analysis.mask)
    grid = np.shape(analysis.maps["peak_displacement_um"])
    tile_um = (analysis.summary.get("parameters", {}).get("maps", {}) or {}).get("tile_um")
    wanted = max(_MIN_TILE_PX, round(float(tile_um) / px_um)) if tile_um else _MIN_TILE_PX

    def fits(p):
        return (-(-shape[0] // p), -(-shape[1] // p)) == tuple(grid)

    candidates = [p for p in range(1, max(shape) + 1) if fits(p)]
    if not candidates:
        raise InputError(
            f"the maps' tile grid {tuple(grid)} does not tile the {tuple(shape)} px mask; pass "
            "the maps, mask and summary of one analysis (beatlab.read_analysis)"
        )
    tile_px = wanted if fits(wanted) else min(candidates, key=lambda p: abs(p - wanted))
    return MapGeometry(px_um, tuple(map(int, shape)), int(tile_px), tuple(map(int, grid)))


def delay_region(analysis, geometry: MapGeometry | None = None) -> tuple[int | None, np.ndarray]:
    """The region whose onset delays are drawn, and its tiles.

    Parameters
    ----------
    analysis : beatlab.results.Analysis
        Uses ``regions`` (``region``, ``area_um2``, ``beat_count``) and ``region_labels``.
    geometry : MapGeometry, optional
        The tile grid (:func:`map_geometry` otherwise).

    Returns
    -------
    region : int or None
        With two regions or more: the largest region that beats (at least 2 beats,
        :func:`beatlab.results.beating_regions`; None if none does). With one region or
        none: None, meaning the whole field.
    tiles : ndarray of bool, shape (ny, nx)
        Tiles whose labelled pixels belong mostly (at least half) to that region; all True
        for the whole field.
    """
    geometry = geometry or map_geometry(analysis)
    regions = analysis.regions
    everything = np.ones(geometry.grid, dtype=bool)
    if len(regions) < 2 or analysis.region_labels is None:
        return None, everything
    beating = beating_regions(regions)
    if not len(beating):
        return None, np.zeros(geometry.grid, dtype=bool)
    region = int(beating["region"].iloc[0])
    labels = np.asarray(analysis.region_labels)
    index = geometry.tile_index().ravel()
    n_tiles = geometry.grid[0] * geometry.grid[1]
    mine = np.bincount(index, weights=(labels == region).ravel(), minlength=n_tiles)
    labelled = np.bincount(index, weights=(labels > 0).ravel(), minlength=n_tiles)
    tiles = (mine > 0) & (mine >= 0.5 * labelled)
    return region, tiles.reshape(geometry.grid)


#: Width (characters) at which panel messages are wrapped.
_WRAP = 30
#: Onset delays are resolved only when they span more than this many frame intervals (the
#: criterion of the propagation fit, docs/outputs.md "Maps and propagation").
_MIN_SPAN_FRAMES = 2.0


def _delay_view(analysis, geometry):
    """What the delay panel shows: (delay ms grid or None, message, title, arrow or None)."""
    maps, beats = analysis.maps, analysis.beats
    prop = maps.get("propagation") or {}
    delay = np.asarray(maps["onset_delay_s"], dtype=float) * 1e3
    if not len(beats) or not np.isfinite(delay).any():
        return None, "no beats detected:\nno onset delays", "onset delay", None
    if not prop.get("resolved"):
        reason = textwrap.fill(str(prop.get("reason") or ""), _WRAP)
        return None, f"propagation not resolved\n\n{reason}".strip(), "onset delay", None
    region, tiles = delay_region(analysis, geometry)
    n_regions = len(analysis.regions)
    if n_regions > 1:
        if region is None:
            return None, "no region beats", "onset delay", None
        shown = np.where(tiles, delay, np.nan)
        title = f"onset delay, region {region} only\n({n_regions} regions: no fit across them)"
        if not np.isfinite(shown).any():
            return None, f"no onset delays in region {region}", title, None
        span = float(np.nanmax(shown) - np.nanmin(shown))
        frame_ms = 1e3 / float(analysis.summary["metadata"]["fps"])
        if span <= _MIN_SPAN_FRAMES * frame_ms:
            message = (
                f"onset delays in region {region} span {span:.1f} ms, under "
                f"{_MIN_SPAN_FRAMES:.0f} frame intervals ({_MIN_SPAN_FRAMES * frame_ms:.0f} ms): "
                "not resolved"
            )
            return None, textwrap.fill(message, _WRAP), title, None
        return shown, None, title, None
    speed, direction = prop.get("speed_cm_s"), prop.get("direction_deg")
    ny, nx = geometry.shape_px
    length = 0.3 * min(nx, ny) * geometry.pixel_size_um
    xs, ys = geometry.tile_centres_um()
    ok = np.isfinite(delay.ravel())
    cx, cy = float(np.mean(xs[ok])), float(np.mean(ys[ok]))
    theta = np.deg2rad(float(direction))
    # y points down the rows (direction 90 deg = +y), as on the drawn image
    arrow = (
        cx - 0.5 * length * np.cos(theta),
        cy - 0.5 * length * np.sin(theta),
        cx + 0.5 * length * np.cos(theta),
        cy + 0.5 * length * np.sin(theta),
    )
    title = f"onset delay, wave (arrow)\n{float(speed):.2g} cm/s towards {float(direction):.0f}°"
    return delay, None, title, arrow


def tabulate_maps(analysis) -> pd.DataFrame:
    """The tile values of the maps figure, as drawn (``maps_plotted.csv``).

    Parameters
    ----------
    analysis : beatlab.results.Analysis
        Uses ``maps``, ``beats``, ``regions``, ``region_labels``, ``mask``, ``summary``.

    Returns
    -------
    pandas.DataFrame
        Columns :data:`beatlab.plots.style.PLOTTED_COLUMNS`; x, y are tile centres in um
        (y down the rows), ``item`` the row-major tile index. Panel ``displacement``:
        series ``amplitude`` (value = peak_displacement_um of the beating tiles, NaN
        elsewhere) and ``not_beating`` (assessed tiles that do not beat, drawn grey); only
        with beats. Panel ``onset_delay``: series ``delay`` (value = onset_delay_s in ms, NaN
        where not drawn), only when propagation is resolved, restricted to the largest beating
        region when there are several (see :func:`delay_region`), and ``arrow`` (tail and head
        of the propagation arrow, one region only). The template and mask panel draws the
        ``template_nm`` and ``mask`` arrays of maps.npz as they are.
    """
    geometry = map_geometry(analysis)
    maps = analysis.maps
    xs, ys = geometry.tile_centres_um()
    item = np.arange(xs.size)
    rows = []
    beating = np.asarray(maps.get("beating", np.zeros(geometry.grid)), dtype=bool).ravel()
    assessed = np.asarray(maps.get("assessed", np.ones(geometry.grid)), dtype=bool).ravel()
    if len(analysis.beats) and beating.any():
        amp = np.asarray(maps["peak_displacement_um"], dtype=float).ravel()
        rows.append(
            plotted_rows(
                "displacement",
                "amplitude",
                x=xs,
                y=ys,
                value=np.where(beating, amp, np.nan),
                item=item,
                x_unit="um",
                y_unit="um",
                value_unit="um",
            )
        )
        grey = assessed & ~beating
        rows.append(
            plotted_rows(
                "displacement",
                "not_beating",
                x=xs[grey],
                y=ys[grey],
                item=item[grey],
                x_unit="um",
                y_unit="um",
            )
        )
    delay, _, _, arrow = _delay_view(analysis, geometry)
    if delay is not None:
        rows.append(
            plotted_rows(
                "onset_delay",
                "delay",
                x=xs,
                y=ys,
                value=delay.ravel(),
                item=item,
                x_unit="um",
                y_unit="um",
                value_unit="ms",
            )
        )
    if arrow is not None:
        rows.append(
            plotted_rows(
                "onset_delay", "arrow", x=arrow[0::2], y=arrow[1::2], x_unit="um", y_unit="um"
            )
        )
    return concat_rows(rows)


def _grid(table, panel, series, geometry):
    part = table[(table["panel"] == panel) & (table["series"] == series)]
    image = np.full(geometry.grid[0] * geometry.grid[1], np.nan)
    image[part["item"].to_numpy(dtype=int)] = part["value"].to_numpy(dtype=float)
    return image.reshape(geometry.grid), part


def _frame_axes(ax, geometry, *, ylabel: bool):
    left, right, bottom, top = geometry.field_extent_um
    ax.set_xlim(left, right)
    ax.set_ylim(bottom, top)
    ax.set_aspect("equal")
    ax.set_xlabel(axis_label("x", "um"))
    if ylabel:
        ax.set_ylabel(axis_label("y", "um"))


def _template_panel(ax, analysis, geometry):
    template = np.asarray(analysis.template, dtype=float)
    finite = template[np.isfinite(template)]
    lo, hi = np.percentile(finite, [0.5, 99.5]) if finite.size else (0.0, 1.0)
    im = ax.imshow(
        template,
        cmap="gray",
        extent=geometry.field_extent_um,
        vmin=lo,
        vmax=hi,
        interpolation="none",
        gid="template",
    )
    ax.contour(
        np.asarray(analysis.mask, dtype=float),
        levels=[0.5],
        colors=PALETTE["orange"],
        linewidths=0.8,
        extent=geometry.field_extent_um,
        origin="upper",
    )
    clipped = finite.size and (finite.min() < lo or finite.max() > hi)
    ax.figure.colorbar(
        im,
        ax=ax,
        label=axis_label("OPD", "nm"),
        shrink=0.8,
        extend="both" if clipped else "neither",
    )
    fraction = 100.0 * float(np.mean(analysis.mask))
    ax.set_title(f"rest template\nmask outlined ({fraction:.0f} % of field)")
    _frame_axes(ax, geometry, ylabel=True)


def _field_shaped_message(ax, geometry, text: str) -> None:
    """A text panel in the frame's shape, so that its title lines up with the map panels'
    (a panel without an image took the figure's whole height, its title at the top)."""
    ny, nx = geometry.shape_px
    ax.set_box_aspect(ny / nx)
    message_panel(ax, text)


def _displacement_panel(ax, analysis, table, geometry):
    amp, part = _grid(table, "displacement", "amplitude", geometry)
    if not len(part):
        _field_shaped_message(ax, geometry, "no beats detected:\nno displacement map")
        ax.set_title("peak displacement")
        return
    listed = _listed(table, "not_beating", geometry)
    grey = np.where(listed, 1.0, np.nan)
    from matplotlib.colors import ListedColormap

    ax.imshow(
        grey,
        cmap=ListedColormap(["#D9D9D9"]),
        extent=geometry.grid_extent_um,
        interpolation="none",
        gid="not_beating",
    )
    im = ax.imshow(
        amp,
        cmap="viridis",
        vmin=0.0,
        vmax=float(np.nanmax(amp)),
        extent=geometry.grid_extent_um,
        interpolation="none",
        gid="amplitude",
    )
    ax.figure.colorbar(im, ax=ax, label=axis_label("peak displacement", "um"), shrink=0.8)
    area = analysis.maps.get("beating_area_fraction")
    share = f"beating area {100 * area:.0f} %" if area is not None else "beating area n/a"
    ax.set_title(
        f"peak displacement per tile\n{share}" + ("\ngrey: not beating" if listed.any() else "")
    )
    _frame_axes(ax, geometry, ylabel=False)


def _listed(table, series, geometry):
    """Boolean tile grid: the tiles listed in ``series`` of the displacement panel."""
    part = table[(table["panel"] == "displacement") & (table["series"] == series)]
    flags = np.zeros(geometry.grid[0] * geometry.grid[1], dtype=bool)
    flags[part["item"].to_numpy(dtype=int)] = True
    return flags.reshape(geometry.grid)


def _delay_panel(ax, analysis, table, geometry):
    _, message, title, _ = _delay_view(analysis, geometry)
    delay, part = _grid(table, "onset_delay", "delay", geometry)
    if not len(part):
        _field_shaped_message(ax, geometry, message)
        ax.set_title(title)
        return
    im = ax.imshow(
        delay, cmap="plasma", extent=geometry.grid_extent_um, interpolation="none", gid="delay"
    )
    ax.figure.colorbar(im, ax=ax, label=axis_label("onset delay", "ms"), shrink=0.8)
    arrow = table[(table["panel"] == "onset_delay") & (table["series"] == "arrow")]
    if len(arrow):
        from matplotlib.patheffects import Normal, Stroke

        (x0, x1), (y0, y1) = arrow["x"].to_numpy(), arrow["y"].to_numpy()
        ax.annotate(
            "",
            xy=(x1, y1),
            xytext=(x0, y0),
            gid="arrow",
            arrowprops={
                "arrowstyle": "-|>",
                "color": "white",
                "lw": 2.0,
                "path_effects": [Stroke(linewidth=3.5, foreground="black"), Normal()],
            },
        )
    ax.set_title(title)
    _frame_axes(ax, geometry, ylabel=False)


def plot_maps(analysis, *, fig=None):
    """Three panels: rest template with mask outline, peak displacement, onset delay.

    Parameters
    ----------
    analysis : beatlab.results.Analysis
        A finished analysis (``beatlab.analyze`` or ``beatlab.read_analysis``).
    fig : matplotlib Figure, optional
        Where to draw; a new figure otherwise.

    Returns
    -------
    matplotlib.figure.Figure
        Axes in um, y down the rows. Without beats the displacement and delay panels are text
        panels (no empty colour bars). The delay panel is drawn only when propagation is
        resolved; with several regions only within the largest beating region, and with one
        region with the propagation arrow (speed and direction in its title).
    """
    if fig is None:
        import matplotlib.pyplot as plt

        fig = plt.figure(figsize=(10.0, 3.6), layout="constrained")
    geometry = map_geometry(analysis)
    table = tabulate_maps(analysis)
    axes = fig.subplots(1, 3)
    _template_panel(axes[0], analysis, geometry)
    _displacement_panel(axes[1], analysis, table, geometry)
    _delay_panel(axes[2], analysis, table, geometry)
    return fig
