"""A small simulated plate analysed once, shared by the report tests.

Four tiny recordings (64 px, 4 s at 20 fps: two vehicle wells, two drug wells that beat
faster), one unreadable file whose name holds a script tag, one excluded row, and a layout
column whose cell holds a script tag. The batch writes each ok recording's ``analyze``
output folder into ``recordings/<recording_id>``; ``P1_A1`` gets stand-in figure files.
"""

import numpy as np
import pandas as pd
import pytest

from beatlab import analyze, analyze_batch
from beatlab.synth import simulate_recording, write_simulation
from tests.report.helpers import ATTACK, IMAGE_ATTACK, save_png

WELLS = [("A1", "vehicle", 60.0), ("A2", "vehicle", 63.0), ("A3", "drug", 90.0),
         ("A4", "drug", 96.0)]  # fmt: skip
HEADER = "path,plate,well,condition,compound,concentration,unit,role,exclude,exclude_reason,note"


def _row(path, well, condition, *, exclude="", reason="", note=""):
    compound, conc, role = ("DMSO", "", "vehicle") if condition == "vehicle" else (
        "E4031", "0.1", "sample")  # fmt: skip
    return f"{path},P1,{well},{condition},{compound},{conc},uM,{role},{exclude},{reason},{note}"


@pytest.fixture(scope="session")
def plate(tmp_path_factory):
    """(batch folder, analysis folder of one recording)."""
    folder = tmp_path_factory.mktemp("plate")
    rows = []
    for seed, (well, condition, rate) in enumerate(WELLS):
        sim = simulate_recording(duration_s=4, fps=20, shape_px=(64, 64), rate_bpm=rate,
                                 noise_nm=1.0, rng=seed)  # fmt: skip
        write_simulation(sim, folder / f"{well}.ome.tif")
        rows.append(_row(f"{well}.ome.tif", well, condition, note=ATTACK if well == "A2" else ""))
    (folder / ATTACK).parent.mkdir(parents=True, exist_ok=True)  # "<script>alert(1)<" folder
    (folder / f"{ATTACK}.tif").write_bytes(b"")
    rows.append(_row(f"{ATTACK}.tif", "B1", "drug"))
    rows.append(_row("gone.tif", "B2", "drug", exclude="yes", reason="out of focus"))
    layout = folder / "layout.csv"
    layout.write_text("\n".join([HEADER, *rows]) + "\n", encoding="utf-8")

    out = tmp_path_factory.mktemp("batch")
    # the figures are drawn here (another module draws the batch ones) and the report is
    # what the tests build
    analyze_batch(layout, out_dir=out, progress=False, workers=1, threads=1, figures=False,
                  report=False)  # fmt: skip

    # the batch wrote each ok recording's analyze folder; analyse A1 here only if it did not
    single = out / "recordings" / "P1_A1"
    if not (single / "summary.json").is_file():
        analyze(folder / "A1.ome.tif", workers=1).save(single, figures=False)
    # the figure files are stand-ins: what is tested is how the report embeds them
    save_png(single / "trace.png", size=(6.0, 2.0))
    save_png(single / "maps.png", color=(0.1, 0.6, 0.3), size=(6.0, 2.0))

    figures = out / "figures"
    figures.mkdir()
    save_png(figures / "groups_beat_rate_bpm.png")
    wells = pd.read_csv(out / "wells.csv")
    wells[["well", "condition", "beat_rate_bpm"]].to_csv(
        figures / "groups_beat_rate_bpm.csv", index=False
    )
    save_png(figures / f"plate_{IMAGE_ATTACK}_beat_rate_bpm.png", color=(0.8, 0.3, 0.1))
    assert np.isfinite(wells["beat_rate_bpm"]).sum() == 4  # the plate analysed as intended
    return out, single
