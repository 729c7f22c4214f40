"""Holography accuracy study (run by hand): OPD error of the reconstruction on known objects.

Reuses the synthetic cell field, curvature aberration and band-limited truth of
``tests/holography/test_reconstruct.py`` and prints the RMS OPD error in the cells with and
without a reference hologram, and the centre OPD of a 5 um polystyrene bead in water against
d (n_sphere - n_medium) with the Ma et al. (2003) dispersion.

    python benchmarks/holography_accuracy.py
"""

import sys
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests" / "holography"))

from test_reconstruct import (
    LAMBDA_NM,
    PIXEL_UM,
    SHAPE,
    _cells,
    _curvature,
    _truth_on_grid,
)

from beatlab.holography import OffAxisReconstructor, render_hologram, render_reference


def main() -> None:
    rng = np.random.default_rng(11)
    opd = _cells(rng)
    optics = {"wavelength_nm": LAMBDA_NM, "aberration_rad": _curvature(), "read_noise_counts": 3.0}
    holo = render_hologram(opd, rng=rng, **optics)
    ref = render_reference(SHAPE, rng=rng, **optics)
    rec = OffAxisReconstructor.fit(
        holo, wavelength_nm=LAMBDA_NM, pixel_size_um=PIXEL_UM, reference=ref
    )
    out = next(rec.opd_frames([holo]))
    truth = _truth_on_grid(rec, opd, (0.23, 0.17))
    cells = truth > 20
    print(
        f"shot + read noise, curvature in both arms, with reference: RMS error in cells "
        f"{np.sqrt(np.mean((out - truth)[cells] ** 2)):.2f} nm "
        f"(output {rec.output_shape} px at {rec.output_pixel_size_um:.3f} um)"
    )
    rng = np.random.default_rng(12)
    opd = _cells(rng)
    holo = render_hologram(opd, wavelength_nm=LAMBDA_NM, aberration_rad=_curvature(), rng=rng)
    rec = OffAxisReconstructor.fit(holo, wavelength_nm=LAMBDA_NM, pixel_size_um=PIXEL_UM)
    out = next(rec.opd_frames([holo]))
    truth = _truth_on_grid(rec, opd, (0.23, 0.17))
    cells = truth > 20
    cells[:2] = cells[-2:] = False
    cells[:, :2] = cells[:, -2:] = False
    print(
        f"same without reference (polynomial levelling): RMS error in cells "
        f"{np.sqrt(np.mean((out - truth)[cells] ** 2)):.2f} nm"
    )
    # Ma et al. 2003, Phys Med Biol 48:4165 dispersion of polystyrene; water n = 1.333
    n_sphere = 1.5725 + 3108 / LAMBDA_NM**2 + 3.4779e8 / LAMBDA_NM**4
    n, px = 256, 0.04
    yy, xx = np.mgrid[:n, :n].astype(float)
    r2 = ((yy - n / 2) * px) ** 2 + ((xx - n / 2) * px) ** 2
    opd = 2e3 * np.sqrt(np.clip(6.25 - r2, 0, None)) * (n_sphere - 1.333)
    rng = np.random.default_rng(16)
    optics = {"wavelength_nm": LAMBDA_NM, "carrier_cycles_per_px": (0.3, 0.22)}
    holo = render_hologram(opd, rng=rng, **optics)
    ref = render_reference(opd.shape, rng=rng, **optics)
    rec = OffAxisReconstructor.fit(holo, wavelength_nm=LAMBDA_NM, pixel_size_um=px, reference=ref)
    out = next(rec.opd_frames([holo]))
    cy, cx = (s // 2 for s in rec.output_shape)
    print(
        f"5 um polystyrene bead in water: centre {out[cy - 1 : cy + 2, cx - 1 : cx + 2].max():.1f}"
        f" nm, expected {5000 * (n_sphere - 1.333):.1f} nm"
    )


if __name__ == "__main__":
    main()
