"""The demo scenario: its files, how each well is simulated, and the demo end to end."""

from pathlib import Path

import pandas as pd
import pytest

from beatlab.cli import main
from beatlab.demo import DEMO_FILES, _scenario, demo_parameters, hill_fraction, run_demo
from beatlab.errors import InputError

ROOT = Path(__file__).resolve().parents[1]


@pytest.mark.parametrize("name", DEMO_FILES)
def test_packaged_scenario_is_the_projects_demo_folder(name):
    # the package carries a copy of demo/ so that `pip install .` can run the demo
    packaged = ROOT / "beatlab" / "data" / "demo" / name
    assert packaged.read_bytes() == (ROOT / "demo" / name).read_bytes(), (
        f"copy demo/{name} to beatlab/data/demo/"
    )


def test_hill_fraction_is_the_hill_equation():
    # Hill equation (Hill 1910; Goutelle et al. 2008, Fundam Clin Pharmacol 22:633):
    # half effect at EC50, and at c = 3 EC50 with h = 2: 9 / 10
    assert hill_fraction(0.3, ec50_uM=0.3, hill=1.5) == pytest.approx(0.5)
    assert hill_fraction(3.0, ec50_uM=1.0, hill=2.0) == pytest.approx(0.9)
    assert hill_fraction(0.0, ec50_uM=1.0, hill=2.0) == 0.0
    assert hill_fraction(float("nan"), ec50_uM=1.0, hill=2.0) == 0.0


def test_each_well_is_simulated_from_its_protocol_and_compound():
    scenario = _scenario()
    scenario["recording"]["well_to_well_cv"] = 0.0  # the effect alone
    base = demo_parameters({"protocol": "P-mono", "compound": "DMSO 0.1%"}, scenario, seed=1)
    assert base["rate_bpm"] == pytest.approx(60.0) and base["ead_beats"] is None
    fast = demo_parameters(
        {"protocol": "P-mono", "compound": "BL-101", "concentration": "0.3"}, scenario, seed=1
    )
    assert fast["rate_bpm"] == pytest.approx(60.0 * (1 + 0.5 * 0.5))  # EC50: half the effect
    assert fast["relax_s"] == pytest.approx(0.35 * (1 - 0.25 * 0.5))
    slow = demo_parameters(
        {"protocol": "P-mono", "compound": "BL-202", "concentration": "3"}, scenario, seed=1
    )
    assert slow["relax_s"] == pytest.approx(0.35 * (1 + 0.9 * 0.9))
    assert slow["ead_beats"][:3] == [1, 3, 5]  # every second beat from 3 uM
    below = demo_parameters(
        {"protocol": "P-mono", "compound": "BL-202", "concentration": "1"}, scenario, seed=1
    )
    assert below["ead_beats"] is None
    other = demo_parameters({"protocol": "P-aggr", "compound": ""}, scenario, seed=1)
    assert other["rate_bpm"] == pytest.approx(46.0)


def test_demo_refuses_a_folder_of_other_files(tmp_path):
    (tmp_path / "thesis.docx").write_text("x")
    with pytest.raises(InputError, match="other files"):
        run_demo(tmp_path, quiet=True)
    with pytest.raises(InputError, match="unknown recording setting"):
        run_demo(tmp_path / "new", quiet=True, recording={"size": 3})
    assert not (tmp_path / "new").exists()  # refused before anything is written


@pytest.mark.slow
def test_demo_end_to_end_on_small_recordings(tmp_path):
    # the whole scenario on small, short recordings, without figures (drawn and checked in
    # tests/batch/test_cli_batch.py and tests/plots), so that the suite stays quick: 3 s
    # of 32 px give the BL-101 EC50 0.54 uM (4 s of 40 px: 0.54 uM) for 20 % less CPU time
    run = run_demo(
        tmp_path / "demo",
        quiet=True,
        recording={"shape_px": 32, "duration_s": 3.0, "fps": 15.0},
        figures=False,
    )
    counts = run.batch.counts
    assert (counts["ok"], counts["error"], counts["excluded"]) == (29, 0, 1)
    assert run.report.is_file() and run.report.stat().st_size > 10_000
    assert "DEMO-1_B3_1" in run.report.read_text(encoding="utf-8")
    recordings = pd.read_csv(run.results / "recordings.csv")
    ok = recordings[recordings["status"] == "ok"]
    assert all((run.results / "recordings" / rid).is_dir() for rid in ok["recording_id"])
    fits = pd.read_csv(run.results / "dose_response.csv").set_index(["compound", "metric"])
    # the BL-101 rate curve comes back near the simulated EC50 of 0.3 uM
    assert 0.1 < fits.loc[("BL-101", "beat_rate_bpm_norm"), "ec50"] < 0.9


def test_demo_command_refuses_a_file_as_its_folder(tmp_path, capsys):
    (tmp_path / "demo").write_text("x")
    assert main(["demo", "--out", str(tmp_path / "demo")]) == 2
    err = capsys.readouterr().err.strip()
    assert err.startswith("beatlab: error: ") and "is a file" in err and "\n" not in err
