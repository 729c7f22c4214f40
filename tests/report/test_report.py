"""The HTML reports: one self-contained file, the right numbers, escaped text, no breakage."""

import base64
import html
import json
import shutil
from html.parser import HTMLParser

import numpy as np
import pandas as pd
import pytest

from beatlab import __version__
from beatlab.errors import InputError
from beatlab.output import CAUTION
from beatlab.report import build_batch_report, build_recording_report
from beatlab.report._figures import batch_figure_title
from beatlab.report._format import (
    column_header,
    format_number,
    format_p,
    metric_label,
    metric_unit,
)
from beatlab.report._html import Html, element, render
from tests.report.helpers import ATTACK, IMAGE_ATTACK, save_png

PNG_PREFIX = "data:image/png;base64,"


class _Tags(HTMLParser):
    """Every start tag with its attributes, and the text, of a document."""

    def __init__(self, text):
        super().__init__(convert_charrefs=True)
        self.tags, self.text = [], []
        self.feed(text)

    def handle_starttag(self, tag, attrs):
        self.tags.append((tag, dict(attrs)))

    def handle_data(self, data):
        self.text.append(data)

    def named(self, tag):
        return [attrs for name, attrs in self.tags if name == tag]


def _assert_self_contained(text):
    assert "http://" not in text and "https://" not in text
    parsed = _Tags(text)
    assert not parsed.named("script")
    for tag, attrs in parsed.tags:
        if "src" in attrs:
            assert attrs["src"].startswith("data:"), (tag, attrs["src"][:40])
        if "href" in attrs:
            assert attrs["href"].startswith(("#", "data:")), attrs["href"]
    assert "url(" not in text  # no stylesheet resource either
    return parsed


@pytest.fixture(scope="module")
def batch_report(plate):
    batch_dir, _ = plate
    path = build_batch_report(batch_dir)
    return batch_dir, path, path.read_text(encoding="utf-8")


def _png_width(data: bytes) -> int:
    return int.from_bytes(data[16:20], "big")  # the IHDR width (PNG specification, 11.2.2)


# --- the batch report --------------------------------------------------------------------


def test_batch_report_is_one_file_with_embedded_figures(batch_report):
    batch_dir, path, text = batch_report
    assert path == batch_dir / "report.html" and path.is_file()
    assert not list(batch_dir.glob(".report.html.*"))  # the atomic write left nothing behind
    parsed = _assert_self_contained(text)
    images = parsed.named("img")
    # every batch figure, and each recording's trace and average beat (the rest of its
    # figures stay in its folder)
    pngs = [
        *(batch_dir / "figures").glob("*.png"),
        *(batch_dir / "recordings").glob("*/trace.png"),
        *(batch_dir / "recordings").glob("*/average_beat.png"),
    ]
    assert len(images) == len(pngs) >= 3
    embedded = [base64.b64decode(img["src"][len(PNG_PREFIX) :]) for img in images]
    assert all(data.startswith(b"\x89PNG\r\n\x1a\n") for data in embedded)
    # shown at their size on paper (100 px per inch of a 300 dpi figure)
    shown = sorted(int(img["width"]) for img in images)
    assert shown == sorted(min(1000, round(_png_width(p.read_bytes()) / 3)) for p in pngs)
    assert all(img["alt"].strip() for img in images)
    # each figure's caption names the CSV of its plotted data (or says there is none)
    assert "figures/groups_beat_rate_bpm.csv" in text
    assert "recordings/P1_A1/trace.csv" in text


def test_batch_report_content(batch_report, plate):
    batch_dir, _, text = batch_report
    recordings = pd.read_csv(batch_dir / "recordings.csv", dtype=str, keep_default_na=False)
    assert html.escape(CAUTION) in text
    assert f"beatlab {__version__}" in text
    for rid in recordings["recording_id"]:
        assert f'<span class="id">{html.escape(rid)}</span>' in text
    error = recordings.loc[recordings["status"] == "error", "error"].iloc[0]
    assert error.startswith("InputError") and html.escape(error) in text
    assert "out of focus" in text  # the excluded row's reason
    info = json.loads((batch_dir / "batch.json").read_text())
    assert html.escape(info["skipped"]["dose_response"]) in text  # why there is no curve
    assert "Beat rate (bpm)" in text and "Duration 90 % (s)" in text


def test_group_table_holds_mean_sd_and_p_adj_of_the_wells(batch_report):
    batch_dir, _, text = batch_report
    wells = pd.read_csv(batch_dir / "wells.csv")
    ok = wells[wells["status"] == "ok"]
    for condition in ("vehicle", "drug"):
        rates = ok.loc[ok["condition"] == condition, "beat_rate_bpm"].to_numpy()
        mean, sd = rates.mean(), np.std(rates, ddof=1)
        # the mean to 3 significant digits, the SD to the same decimals (or its first digit)
        decimals = max(2 - int(np.floor(np.log10(abs(mean)))), -int(np.floor(np.log10(sd))), 0)
        assert f"{mean:.{decimals}f} ± {sd:.{decimals}f}" in text, condition
    groups = pd.read_csv(batch_dir / "groups.csv")
    p_adj = groups.loc[groups["metric"] == "beat_rate_bpm_norm", "p_adj"].iloc[0]
    assert f"p_adj {format_p(p_adj)}" in text
    assert np.isfinite(p_adj) and p_adj < 0.05  # 60/63 against 90/96 bpm


def test_untrusted_names_and_cells_are_escaped(batch_report):
    _, _, text = batch_report
    assert ATTACK not in text and IMAGE_ATTACK not in text
    escaped = html.escape(ATTACK, quote=True)
    # the failing file's name (file column and error line) and the layout cell of A2
    assert text.count(escaped) >= 3
    assert html.escape(f"Plate {IMAGE_ATTACK}", quote=True) in text  # figure name, caption
    parsed = _Tags(text)
    assert not parsed.named("script")
    assert all(img["src"].startswith(PNG_PREFIX) for img in parsed.named("img"))
    assert "alert(1)" not in "".join(a.get("onerror", "") for _, a in parsed.tags)


def test_missing_and_damaged_files_do_not_break_the_batch_report(plate, tmp_path):
    batch_dir, _ = plate
    copy = shutil.copytree(batch_dir, tmp_path / "damaged")
    for name in ("wells.csv", "groups.csv", "incidence.csv", "report.html"):
        (copy / name).unlink(missing_ok=True)
    shutil.rmtree(copy / "recordings")
    (copy / "batch.json").write_text("{not json", encoding="utf-8")
    (copy / "figures" / "broken.png").write_bytes(b"not a png")
    for png in (copy / "figures").glob("groups_*"):
        png.unlink()
    out = build_batch_report(copy, out=tmp_path / "elsewhere" / "r.html")
    text = out.read_text(encoding="utf-8")
    assert out == tmp_path / "elsewhere" / "r.html" and not (copy / "report.html").exists()
    assert "wells.csv not found" in text and "groups.csv not found" in text
    assert "batch.json could not be read" in text
    assert "broken.png: not a readable PNG image" in text
    assert html.escape(CAUTION) in text and "P1_A4" in text
    assert len(_assert_self_contained(text).named("img")) == 1  # only the plate figure left


def test_batch_report_from_hand_written_tables(tmp_path):
    """Dose-response, Z' and a folder without recordings.csv rows for a recording folder."""
    (tmp_path / "batch.json").write_text(json.dumps({"beatlab_version": "9.9.9"}))
    pd.DataFrame({
        "compound": ["Dx", "Dx"], "metric": ["beat_rate_bpm_norm", "duration_90_s_norm"],
        "unit": ["uM", "uM"], "ec50": [0.123456, 2.5], "ec50_low": [0.05, ""],
        "ec50_high": [0.31, ""], "hill": [1.2, 0.8], "bottom": [0.0, 0.0],
        "top": [-80.0, 30.0], "r2": [0.97, 0.5], "n": [12, 12], "n_concentrations": [5, 5],
        "fit": ["ok", "extrapolated"], "direction": ["falling", "rising"],
    }).to_csv(tmp_path / "dose_response.csv", index=False)  # fmt: skip
    pd.DataFrame({
        "plate": ["P1", "P2"], "metric": ["beat_rate_bpm", "beat_rate_bpm"],
        "z_prime": [0.62, -0.4], "n_positive": [4, 4], "n_negative": [4, 4],
        "negative_role": ["vehicle", "negative"],
    }).to_csv(tmp_path / "z_prime.csv", index=False)  # fmt: skip
    folder = tmp_path / "recordings" / "R9"
    folder.mkdir(parents=True)
    (folder / "summary.json").write_text(json.dumps({"beat_count": 7, "beat_rate_bpm": 72.5}))
    save_png(folder / "trace.png")
    text = build_batch_report(tmp_path).read_text(encoding="utf-8")
    assert "0.123 [0.0500, 0.310] uM" in text  # EC50 [95 % CI] unit, 3 significant digits
    assert "2.50 [CI not bounded] uM" in text
    assert '<span class="badge flag">extrapolated</span>' in text
    assert "Beat rate, normalised (%)" in text
    assert "excellent (≥ 0.5)" in text and "controls overlap (≤ 0)" in text
    assert "9.9.9" in text and "R9" in text and "72.5" in text
    assert "recordings.csv not found" in text
    assert len(_assert_self_contained(text).named("img")) == 1


def test_a_recording_id_never_leads_out_of_the_recordings_folder(tmp_path):
    batch = tmp_path / "batch"
    (batch / "recordings").mkdir(parents=True)
    save_png(tmp_path / "secret.png")  # in the folder recordings/../..
    outside = tmp_path / "outside"
    outside.mkdir()
    save_png(outside / "trace.png")
    ids = ["../../outside", "..", "../..", "ok_one"]
    pd.DataFrame({"recording_id": ids, "status": ["ok"] * len(ids)}).to_csv(
        batch / "recordings.csv", index=False
    )
    (batch / "recordings" / "ok_one").mkdir()
    save_png(batch / "recordings" / "ok_one" / "trace.png")
    text = build_batch_report(batch).read_text(encoding="utf-8")
    assert len(_Tags(text).named("img")) == 1  # only the figure inside recordings/ok_one
    assert "../../outside" in text  # still listed, as text


def test_not_a_batch_folder_is_an_input_error(tmp_path):
    with pytest.raises(InputError, match=r"not a batch folder.*beatlab batch") as info:
        build_batch_report(tmp_path)
    assert "\n" not in str(info.value)
    with pytest.raises(InputError, match="is not a folder"):
        build_batch_report(tmp_path / "nothing")


# --- the one-recording report ------------------------------------------------------------


def test_recording_report_from_an_analyze_folder(plate, tmp_path):
    single = shutil.copytree(plate[1], tmp_path / "A1")
    path = build_recording_report(single)
    assert path == single / "report.html"
    text = path.read_text(encoding="utf-8")
    parsed = _assert_self_contained(text)
    summary = json.loads((single / "summary.json").read_text())
    beats = pd.read_csv(single / "beats.csv")
    assert html.escape(CAUTION) in text and f"beatlab {__version__}" in text
    assert "A1.ome.tif" in text
    assert f"All {len(beats)} beats" in text and summary["beat_count"] == len(beats) > 2
    assert format_number(summary["beat_rate_bpm"]) in text
    assert format_number(summary["duration_90_s"]) in text
    drift = summary["quality"]["drift_net_um"]  # a list: shown item by item
    assert ", ".join(format_number(v) for v in drift) in text
    images = parsed.named("img")
    assert len(images) == len(list(single.glob("*.png"))) >= 2
    # the beat table: one row per beat, the first column the beat number
    cells = [html.unescape(t).strip() for t in parsed.text]
    assert all(str(b) in cells for b in beats["beat"])


def test_recording_figures_in_fixed_order_and_minimal_summary(tmp_path):
    (tmp_path / "summary.json").write_text(json.dumps({"beat_count": 0, "rhythm": "quiescent"}))
    for stem in ("zeta", "regions", "poincare", "trace"):
        save_png(tmp_path / f"{stem}.png")
    (tmp_path / "trace.csv").write_text("time_s\n0\n")
    text = build_recording_report(tmp_path, out=tmp_path / "r.html").read_text()
    alts = [a["alt"] for a in _Tags(text).named("img")]
    assert [a.split(" (")[0] for a in alts] == [
        "Displacement trace with the onset, peak and end of every beat",
        "Poincaré plot of successive inter-beat intervals",
        "Independently beating regions and their traces",
        "Zeta",
    ]
    assert "No beat table: beats.csv not found" in text
    assert "quiescent" in text and html.escape(CAUTION) in text


def test_recording_report_needs_a_readable_summary(tmp_path):
    with pytest.raises(InputError, match=r"summary\.json.*beatlab analyze"):
        build_recording_report(tmp_path)
    (tmp_path / "summary.json").write_text("[1, 2]")
    with pytest.raises(InputError, match="does not hold a JSON object"):
        build_recording_report(tmp_path)


# --- formatting and escaping -------------------------------------------------------------


@pytest.mark.parametrize(
    ("value", "expected"),
    [(60.0274, "60.0"), (0.38329, "0.383"), (0.99954, "1.00"), ("4.0", "4"), (1234.56, "1235"),
     (2.1e-5, "2.1e-05"), (-0.0123456, "-0.0123"), (None, "—"), ("", "—"), (float("nan"), "—"),
     ("True", "yes"), (False, "no"), ("regular", "regular"), (3e7, "3e+07")],
)  # fmt: skip
def test_format_number(value, expected):
    assert format_number(value) == expected


def test_format_p_and_units():
    assert [format_p(v) for v in (0.0067567, 0.54101, 2e-6, "", 1.0)] == [
        "0.0068", "0.54", "< 0.001", "—", "1"]  # fmt: skip
    assert metric_unit("beat_rate_bpm") == "bpm" and metric_unit("displacement_um") == "µm"
    assert metric_unit("displacement_um_norm") == "%"
    assert metric_unit("irregular_fraction_norm") == ""  # normalised as a difference
    assert metric_unit("contraction_velocity_um_s") == "µm/s"
    assert metric_unit("quality_drift_max_um") == "µm" and metric_unit("beat_count") == ""
    assert column_header("duration_90_s") == "Duration 90 % (s)"
    assert column_header("beat_rate_bpm_change") == "Beat rate, change from baseline (%)"
    assert metric_label("some_new_metric_nm") == "Some new metric"
    # a statistics column is not a normalised metric, though its name ends in _change
    assert column_header("percent_change") == "Change vs control (%)"
    assert column_header("hedges_g") == "Hedges' g"


def test_figure_titles_from_file_names():
    assert batch_figure_title("groups_beat_rate_bpm") == "Groups: Beat rate (bpm)"
    assert batch_figure_title("plate_P_1_duration_90_s") == "Plate P_1: Duration 90 % (s)"
    assert batch_figure_title("dose_response_displacement_um_norm") == (
        "Dose-response: Displacement, normalised (%)"
    )
    assert batch_figure_title("gallery") == "Gallery of recordings"


def test_render_escapes_text_and_attributes_but_keeps_markup():
    assert render(ATTACK) == "&lt;script&gt;alert(1)&lt;/script&gt;"
    assert render(Html("<b>x</b>")) == "<b>x</b>"
    assert Html("<b>") + "<i>" == "<b>&lt;i&gt;" and isinstance(Html("a") + "b", Html)
    tag = element("span", ATTACK, title='" onmouseover="alert(1)')
    assert tag == (
        '<span title="&quot; onmouseover=&quot;alert(1)">'
        "&lt;script&gt;alert(1)&lt;/script&gt;</span>"
    )


def test_large_figures_are_embedded_downsampled_at_their_display_size(tmp_path):
    # a 300 dpi figure 7 inches wide (2100 px) shows 700 px wide on screen and is embedded
    # at 2 px per shown pixel (1400 px): a plate's report stays small
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    from beatlab.report._html import embed_png

    fig, ax = plt.subplots(figsize=(7, 3))
    ax.plot([0, 1, 2], [0, 1, 0])
    with matplotlib.rc_context({"savefig.bbox": "standard"}):  # the whole 7 x 3 inches
        fig.savefig(tmp_path / "big.png", dpi=300)
    plt.close(fig)
    original = (tmp_path / "big.png").read_bytes()
    assert _png_width(original) == 2100
    tag = str(embed_png(tmp_path / "big.png", alt="x"))
    assert 'width="700"' in tag
    data = base64.b64decode(tag.split('src="')[1].split('"')[0][len(PNG_PREFIX) :])
    assert _png_width(data) == 1400
    one = str(embed_png(tmp_path / "big.png", alt="x", density=1))
    assert (
        _png_width(base64.b64decode(one.split('src="')[1].split('"')[0][len(PNG_PREFIX) :])) == 700
    )


def test_a_figure_shrunk_ahead_is_embedded_as_it_would_be_shrunk_here(tmp_path, monkeypatch):
    import matplotlib.pyplot as plt

    import beatlab.report._html as h

    fig, ax = plt.subplots(figsize=(7, 3))
    ax.plot([0, 1, 2], [0, 1, 0])
    fig.savefig(tmp_path / "big.png", dpi=300)
    plt.close(fig)
    tag = str(h.embed_png(tmp_path / "big.png", alt="x"))  # shrunk here
    prepared = h.shrink_ahead(tmp_path / "big.png")
    assert h.shrink_ahead(tmp_path / "big.png", density=10) is None  # small enough as it is
    assert h.shrink_ahead(tmp_path / "missing.png") is None
    h.keep_shrunk([prepared, None])

    def no_shrinking_here(data, width_px):
        raise AssertionError("shrunk again")

    with monkeypatch.context() as patch:
        patch.setattr(h, "_shrink", no_shrinking_here)
        assert str(h.embed_png(tmp_path / "big.png", alt="x")) == tag  # the kept bytes
    assert not h._SHRUNK  # used once
    # a file changed since: its bytes are not the kept ones, it is shrunk here
    h.keep_shrunk([prepared])
    (tmp_path / "big.png").write_bytes((tmp_path / "big.png").read_bytes() + b"\0")
    with monkeypatch.context() as patch:
        patch.setattr(h, "_shrink", lambda data, width_px: b"shrunk here")
        embedded = str(h.embed_png(tmp_path / "big.png", alt="x"))
    assert base64.b64encode(b"shrunk here").decode() in embedded
    h._SHRUNK.clear()


def test_a_figure_shrunk_from_its_drawn_pixels_is_the_figure_shrunk_from_its_file(tmp_path):
    """save_figure hands over the PNG's pixels as drawn; shrinking those gives the bytes of
    shrinking the decoded file (what the report would embed), and pixels of another size
    are not trusted."""
    from PIL import Image

    import beatlab.report._html as h
    from beatlab.plots import save_figure

    seen = []
    path = save_figure(
        lambda ax: ax.plot([0, 1, 2], [0, 1, 0.5], label="x") and ax.legend(),
        tmp_path / "big.png", size=(7, 3), formats=("png", "svg"),
        on_png=lambda pixels: seen.append(pixels.copy()),
    )  # fmt: skip
    (pixels,) = seen  # once: for the PNG, not the SVG
    with Image.open(path) as image:
        np.testing.assert_array_equal(np.asarray(image.convert("RGBA")), pixels)
    from_file = h.shrink_ahead(path)
    assert from_file is not None
    assert h.shrink_ahead(path, pixels=pixels) == from_file
    other = np.zeros((10, 20, 4), dtype=np.uint8)  # not the file's size: decoded instead
    assert h.shrink_ahead(path, pixels=other) == from_file


def test_group_labels_say_each_thing_once():
    from beatlab.report._batch_tables import group_label

    by = ["condition", "compound", "concentration"]
    row = {"condition": "BL-101 0.3 uM", "compound": "BL-101", "concentration": 0.3,
           "unit": "uM"}  # fmt: skip
    assert group_label(row, by) == "BL-101 0.3 uM"  # not "BL-101 0.3 uM BL-101 0.3 uM"
    vehicle = {"condition": "P-mono vehicle", "compound": "DMSO", "concentration": 0,
               "unit": ""}  # fmt: skip
    assert group_label(vehicle, by) == "P-mono vehicle (DMSO)"  # no concentration 0
    bare = {"condition": "", "compound": "X", "concentration": 1, "unit": "nM"}
    assert group_label(bare, by) == "X 1 nM"
