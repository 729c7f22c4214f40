"""One house style for every figure: fonts, sizes, a colour-blind-safe palette."""

from __future__ import annotations

__all__ = ["PALETTE", "RC", "apply_style"]

#: Okabe & Ito (2008) colour-blind-safe palette.
PALETTE = {
    "black": "#000000",
    "orange": "#E69F00",
    "sky": "#56B4E9",
    "green": "#009E73",
    "yellow": "#F0E442",
    "blue": "#0072B2",
    "vermillion": "#D55E00",
    "purple": "#CC79A7",
}

RC = {
    "font.size": 9,
    "axes.titlesize": 9,
    "axes.labelsize": 9,
    "xtick.labelsize": 8,
    "ytick.labelsize": 8,
    "legend.fontsize": 8,
    "axes.spines.top": False,
    "axes.spines.right": False,
    "axes.linewidth": 0.8,
    "lines.linewidth": 1.2,
    "savefig.dpi": 200,
    "figure.dpi": 100,
    "savefig.bbox": "tight",
    "axes.prop_cycle": None,
}


def apply_style(mpl) -> None:
    """Set the house rc parameters on the given matplotlib module."""
    from cycler import cycler

    rc = dict(RC)
    rc["axes.prop_cycle"] = cycler(
        color=[
            PALETTE[k]
            for k in ("blue", "vermillion", "green", "orange", "purple", "sky", "yellow", "black")
        ]
    )
    mpl.rcParams.update(rc)
