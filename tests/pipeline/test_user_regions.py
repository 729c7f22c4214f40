"""User regions of interest: a label image analysed region by region (`--regions`)."""

import json

import numpy as np
import pandas as pd
import pytest
import tifffile

from beatlab.cli import main
from beatlab.synth import simulate_recording, write_simulation


@pytest.fixture(scope="module")
def two_clusters(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("roi")
    sim = simulate_recording(
        duration_s=12,
        fps=30,
        shape_px=(128, 128),
        n_clusters=2,
        cluster_rates_bpm=(40, 65),
        noise_nm=1.0,
        rng=12,
    )
    paths = write_simulation(sim, tmp / "two.ome.tif")
    return sim, tmp, paths


def test_label_image_gives_one_result_per_region(two_clusters):
    sim, tmp, _paths = two_clusters
    from scipy import ndimage

    labels = ndimage.grey_dilation(sim.cluster_labels, size=(5, 5)).astype(np.uint16)
    tifffile.imwrite(tmp / "rois.tif", labels)
    out = tmp / "res"
    assert (
        main(
            [
                "analyze",
                str(tmp / "two.ome.tif"),
                "--regions",
                str(tmp / "rois.tif"),
                "--out",
                str(out),
                "--no-figures",
            ]
        )
        == 0
    )
    regions = pd.read_csv(out / "regions.csv")
    assert regions["region"].tolist() == [1, 2]
    truth = {r["label"]: r["summary"]["beat_rate_bpm"] for r in sim.truth["regions"]}
    for _, row in regions.iterrows():
        assert row["beat_rate_bpm"] == pytest.approx(truth[row["region"]], rel=0.01)
    beats = pd.read_csv(out / "region_beats.csv")
    assert set(beats["region"]) == {1, 2}
    traces = pd.read_csv(out / "region_traces.csv")
    assert list(traces.columns) == [
        "time_s", "region", "displacement_um", "velocity_um_s", "opd_change_nm"
    ]  # fmt: skip
    assert set(traces["region"]) == {1, 2}
    assert (traces.groupby("region").size() == len(pd.read_csv(out / "trace.csv"))).all()
    summary = json.loads((out / "summary.json").read_text())
    assert summary["n_regions"] == 2


def test_label_image_of_the_wrong_size(two_clusters, capsys):
    _, tmp, _ = two_clusters
    tifffile.imwrite(tmp / "small.tif", np.ones((10, 10), np.uint16))
    code = main(
        [
            "analyze",
            str(tmp / "two.ome.tif"),
            "--regions",
            str(tmp / "small.tif"),
            "--out",
            str(tmp / "bad"),
            "--no-figures",
        ]
    )
    assert code == 2
    assert "label image shape" in capsys.readouterr().err
