"""Shared helpers (imported, not a conftest) for the report tests."""

import matplotlib

matplotlib.use("Agg")

ATTACK = "<script>alert(1)</script>"
IMAGE_ATTACK = "<img src=x onerror=alert(1)>"  # a file name cannot hold "/"


def save_png(path, *, color=(0.2, 0.4, 0.7), size=(3.0, 2.0)):
    """A small bar chart in `color` (PNG at 200 dpi, like beatlab's figures)."""
    import matplotlib.pyplot as plt

    fig, ax = plt.subplots(figsize=size)
    ax.bar([0, 1, 2], [1, 3, 2], color=[color] * 3)
    fig.savefig(path, dpi=200)
    plt.close(fig)
    return path
