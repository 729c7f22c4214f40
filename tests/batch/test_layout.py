import hashlib
import math
import os

import pandas as pd
import pytest

from beatlab.batch.layout import Layout, read_layout, validate_layout
from beatlab.errors import InputError


def _write(folder, text, *, files=(), name="layout.csv"):
    """A layout file in ``folder`` plus empty recording files (relative names)."""
    for file in files:
        path = folder / file
        path.parent.mkdir(parents=True, exist_ok=True)
        path.touch()
    layout = folder / name
    layout.write_text(text, encoding="utf-8")
    return layout


def _problem(tmp_path, text, *, files=("a.tif", "b.tif", "c.tif")):
    """The message of the error that reading this layout raises."""
    layout = _write(tmp_path, text, files=files)
    with pytest.raises(InputError) as info:
        read_layout(layout)
    return str(info.value)


def _line(message, row):
    """The one line of an error message about spreadsheet ``row``."""
    lines = [
        line.strip() for line in message.splitlines() if line.strip().startswith(f"row {row},")
    ]
    assert len(lines) == 1, message
    return lines[0]


# --- reading and resolving ---------------------------------------------------------------


def test_minimal_layout_resolves_paths_and_adds_columns(tmp_path):
    (tmp_path / "elsewhere").mkdir()
    absolute = tmp_path / "elsewhere" / "x.tif"
    absolute.touch()
    layout = _write(tmp_path, f"path\nsub/a.tif\n{absolute}\n", files=["sub/a.tif"])
    result = read_layout(layout)
    table = result.table
    assert isinstance(result, Layout)
    assert result.base_dir == tmp_path
    assert list(table["path"]) == [str(tmp_path / "sub" / "a.tif"), str(absolute)]
    assert list(table["path_as_given"]) == ["sub/a.tif", str(absolute)]
    assert list(table["layout_row"]) == [2, 3]
    assert list(table["role"]) == ["sample", "sample"]
    assert list(table["exclude"]) == [False, False]
    assert table.columns[:3].tolist() == ["recording_id", "layout_row", "path"]
    for column in ("plate", "well", "fov", "timepoint", "exclude_reason"):
        assert list(table[column]) == ["", ""]


def test_headers_match_case_insensitively_and_semicolons_are_read(tmp_path):
    layout = _write(tmp_path, "Path;Well;Temperature C\na.tif;b03;37\n", files=["a.tif"])
    table = read_layout(layout).table
    assert table.loc[0, "well"] == "B3"
    assert table.loc[0, "temperature_c"] == 37.0


def test_windows_line_ends(tmp_path):
    layout = tmp_path / "layout.csv"
    layout.write_bytes(b"path,well\r\na.tif,A1\r\n\r\nb.tif,Z1\r\n")
    (tmp_path / "a.tif").touch()
    (tmp_path / "b.tif").touch()
    with pytest.raises(InputError, match="row 4, column well"):
        read_layout(layout)


def test_spreadsheet_byte_order_mark_is_ignored(tmp_path):
    layout = tmp_path / "layout.csv"
    layout.write_bytes("path,well\na.tif,A1\n".encode("utf-8-sig"))
    (tmp_path / "a.tif").touch()
    assert read_layout(layout).table.loc[0, "well"] == "A1"


@pytest.mark.parametrize(
    ("given", "expected"), [("a01", "A1"), ("B12", "B12"), ("p24", "P24"), ("h007", "H7")]
)
def test_well_names_are_normalised(tmp_path, given, expected):
    layout = _write(tmp_path, f"path,well\na.tif,{given}\n", files=["a.tif"])
    assert read_layout(layout).table.loc[0, "well"] == expected


def test_extra_columns_are_carried_through_unchanged(tmp_path):
    layout = _write(tmp_path, "path,operator,Notes \na.tif, Ann ,x;y\n", files=["a.tif"])
    table = read_layout(layout).table
    assert table.loc[0, "operator"] == " Ann "
    assert table.loc[0, "Notes"] == "x;y"


def test_blank_lines_are_dropped_but_keep_the_row_numbers(tmp_path):
    message = _problem(tmp_path, "path,well\na.tif,A1\n\n,,\nb.tif,Z9\n")
    assert "row 5, column well" in message
    layout = _write(tmp_path, "path,well\na.tif,A1\n\nb.tif,A2\n", files=["a.tif", "b.tif"])
    assert list(read_layout(layout).table["layout_row"]) == [2, 4]


def test_vehicle_with_blank_concentration_is_zero(tmp_path):
    text = "path,compound,concentration,unit,role\na.tif,,,,vehicle\nb.tif,cA,,,\n"
    table = read_layout(_write(tmp_path, text, files=["a.tif", "b.tif"])).table
    assert table.loc[0, "concentration"] == 0.0
    assert math.isnan(table.loc[0, "concentration_as_given"])
    assert math.isnan(table.loc[1, "concentration"])


@pytest.mark.parametrize(
    ("cell", "expected"),
    [("true", True), ("YES", True), ("1", True), ("False", False), ("no", False), ("0", False),
     ("", False)],
)  # fmt: skip
def test_exclude_values(tmp_path, cell, expected):
    layout = _write(tmp_path, f"path,exclude\na.tif,{cell}\n", files=["a.tif"])
    assert bool(read_layout(layout).table.loc[0, "exclude"]) is expected


def test_validate_layout_takes_a_table_built_in_code(tmp_path):
    (tmp_path / "a.tif").touch()
    table = pd.DataFrame({"path": ["a.tif"], "fps": [50.0], "exclude": [False]})
    out = validate_layout(table, base_dir=tmp_path)
    assert out.loc[0, "fps"] == 50.0
    assert out["exclude"].dtype == bool and not out.loc[0, "exclude"]
    assert out.loc[0, "path"] == str(tmp_path / "a.tif")


# --- globs ---------------------------------------------------------------------------------


def test_glob_expands_to_one_row_per_file_in_natural_order(tmp_path):
    files = ["plate1/A1/f10.tif", "plate1/A1/f2.tif", "plate1/A1/f1.ome.tif", "plate1/A1/x.npy"]
    text = "path,plate,well,condition,fps\nplate1/A1/*.tif,P1,A1,drug,50\n"
    table = read_layout(_write(tmp_path, text, files=files)).table
    assert list(table["fov"]) == ["f1", "f2", "f10"]
    assert list(table["path"]) == [str(tmp_path / "plate1/A1" / n) for n in
                                   ("f1.ome.tif", "f2.tif", "f10.tif")]  # fmt: skip
    assert set(table["condition"]) == {"drug"}
    assert set(table["fps"]) == {50.0}
    assert set(table["layout_row"]) == {2}
    assert set(table["path_as_given"]) == {"plate1/A1/*.tif"}
    assert list(table["recording_id"]) == ["P1_A1_f1", "P1_A1_f2", "P1_A1_f10"]


def test_glob_fov_names_stay_distinct_across_folders(tmp_path):
    files = ["A1/f1.tif", "A1/f1.npy", "B1/f1.tif"]
    (tmp_path / "run [1]").mkdir()
    layout = _write(tmp_path / "run [1]", "path,well\nA1/f1.*,A1\n*/f1.tif,B1\n", files=files)
    table = read_layout(layout).table
    assert list(table["fov"]) == ["A1/f1.npy", "A1/f1.tif", "A1/f1.tif", "B1/f1.tif"]
    assert table["recording_id"].is_unique


def test_glob_matching_one_file_keeps_fov_blank(tmp_path):
    table = read_layout(_write(tmp_path, "path,well\n*.tif,A1\n", files=["only.tif"])).table
    assert len(table) == 1
    assert table.loc[0, "fov"] == ""


def test_glob_matching_nothing_is_an_error(tmp_path):
    line = _line(_problem(tmp_path, "path,well\na.tif,A1\nnone/*.tif,A2\n"), 3)
    assert "column path" in line and "matches no file" in line


def test_glob_with_a_fixed_fov_is_a_duplicate(tmp_path):
    line = _line(_problem(tmp_path, "path,well,fov\n*.tif,A1,1\n"), 2)
    assert "column fov" in line and "leave fov blank" in line


def test_hdf5_dataset_suffix_checks_the_file(tmp_path):
    layout = _write(tmp_path, "path\nrec.h5:/movie/opd\n", files=["rec.h5"])
    assert read_layout(layout).table.loc[0, "path"] == str(tmp_path / "rec.h5") + ":/movie/opd"


# --- recording ids -------------------------------------------------------------------------


def test_recording_id_without_well_is_a_hash_of_the_relative_path(tmp_path):
    table = read_layout(_write(tmp_path, "path\na.tif\nb.tif\n", files=["a.tif", "b.tif"])).table
    expected = "rec-" + hashlib.sha1(b"a.tif").hexdigest()[:10]
    assert table.loc[0, "recording_id"] == expected
    assert table["recording_id"].is_unique


def test_recording_id_from_plate_well_fov_timepoint(tmp_path):
    text = "path,plate,well,fov,timepoint\na.tif,plate 1,A1,2,day_3\n"
    table = read_layout(_write(tmp_path, text, files=["a.tif"])).table
    assert table.loc[0, "recording_id"] == "plate-1_A1_2_day-3"


def test_same_file_listed_twice_without_well_is_an_error(tmp_path):
    line = _line(_problem(tmp_path, "path\na.tif\nb.tif\n./a.tif\n"), 4)
    assert "column path" in line and "row 2" in line


# --- one test per validation problem -------------------------------------------------------


def test_missing_file(tmp_path):
    line = _line(_problem(tmp_path, "path,well\na.tif,A1\nmissing.tif,A2\n"), 3)
    assert "column path" in line and "missing.tif does not exist" in line


def test_blank_path_cell(tmp_path):
    line = _line(_problem(tmp_path, "path,well\na.tif,A1\n,A2\n"), 3)
    assert "column path" in line


def test_excluded_row_skips_the_file_check_only(tmp_path):
    text = "path,well,exclude,exclude_reason\na.tif,A1,,\nmissing.tif,A2,yes,lost\n"
    table = read_layout(_write(tmp_path, text, files=["a.tif"])).table
    assert list(table["exclude"]) == [False, True]
    assert table.loc[1, "exclude_reason"] == "lost"
    line = _line(_problem(tmp_path, "path,well,exclude\nmissing.tif,Z1,yes\n"), 2)
    assert "column well" in line


def test_missing_reference_file(tmp_path):
    line = _line(_problem(tmp_path, "path,kind,reference\na.tif,hologram,bg/ref.tif\n"), 2)
    assert "column reference" in line and "ref.tif does not exist" in line


def test_missing_regions_file(tmp_path):
    line = _line(_problem(tmp_path, "path,regions\na.tif,labels.tif\n"), 2)
    assert "column regions" in line


def test_duplicate_plate_well_fov_timepoint(tmp_path):
    text = "path,plate,well,fov,timepoint\na.tif,P1,A1,1,t0\nb.tif,P1,A1,2,t0\nc.tif,P1,a01,1,t0\n"
    line = _line(_problem(tmp_path, text), 4)
    assert "column plate+well+fov+timepoint" in line and "also in row 2" in line


@pytest.mark.parametrize(
    "column",
    ["concentration", "fps", "pixel_size_um", "wavelength_nm", "minutes_after_dose",
     "temperature_c", "cmax"],
)  # fmt: skip
def test_non_numeric_value(tmp_path, column):
    text = f'path,{column},unit\na.tif,1,uM\nb.tif,"1,5",uM\n'
    line = _line(_problem(tmp_path, text), 3)
    assert f"column {column}" in line and "'1,5' is not a number" in line


def test_negative_concentration(tmp_path):
    line = _line(_problem(tmp_path, "path,concentration,unit\na.tif,-0.1,uM\n"), 2)
    assert "column concentration" in line and "negative" in line


@pytest.mark.parametrize("column", ["fps", "pixel_size_um", "wavelength_nm", "cmax"])
def test_physical_value_must_be_positive(tmp_path, column):
    line = _line(_problem(tmp_path, f"path,{column}\na.tif,0\n"), 2)
    assert f"column {column}" in line and "not positive" in line


def test_unknown_role(tmp_path):
    line = _line(_problem(tmp_path, "path,role\na.tif,Vehicle\nb.tif,control\n"), 3)
    assert "column role" in line and "'control'" in line and "vehicle, positive" in line


def test_unknown_kind(tmp_path):
    line = _line(_problem(tmp_path, "path,kind\na.tif,tiff\n"), 2)
    assert "column kind" in line and "opd, phase, hologram" in line


@pytest.mark.parametrize("well", ["Q1", "A25", "A0", "11", "AA1"])
def test_bad_well_name(tmp_path, well):
    line = _line(_problem(tmp_path, f"path,well\na.tif,{well}\n"), 2)
    assert "column well" in line and f"'{well}'" in line


def test_invalid_exclude_value(tmp_path):
    line = _line(_problem(tmp_path, "path,exclude\na.tif,maybe\n"), 2)
    assert "column exclude" in line


def test_concentration_without_unit(tmp_path):
    line = _line(_problem(tmp_path, "path,concentration,unit\na.tif,0,\nb.tif,3,\n"), 3)
    assert "column unit" in line and "concentration 3 has no unit" in line


def test_concentration_without_unit_column(tmp_path):
    line = _line(_problem(tmp_path, "path,concentration\na.tif,0\nb.tif,3\n"), 3)
    assert "column unit" in line


def test_mixed_molar_units_are_converted_to_the_most_common(tmp_path):
    text = (
        "path,compound,concentration,unit\n"
        "a.tif,cA,100,nM\nb.tif,cA,300,nM\nc.tif,cA,1,µM\nd.tif,cB,2,μM\n"
    )
    files = ["a.tif", "b.tif", "c.tif", "d.tif"]
    table = read_layout(_write(tmp_path, text, files=files)).table
    assert list(table["unit"]) == ["nM", "nM", "nM", "uM"]
    assert list(table["concentration"]) == [100.0, 300.0, 1000.0, 2.0]
    assert list(table["concentration_as_given"]) == [100.0, 300.0, 1.0, 2.0]
    assert list(table["unit_as_given"]) == ["nM", "nM", "µM", "μM"]


def test_unit_tie_goes_to_the_first_unit_in_layout_order(tmp_path):
    text = "path,compound,concentration,unit\na.tif,cA,0.5,mM\nb.tif,cA,30,uM\n"
    table = read_layout(_write(tmp_path, text, files=["a.tif", "b.tif"])).table
    assert list(table["unit"]) == ["mM", "mM"]
    assert table.loc[1, "concentration"] == pytest.approx(0.03, rel=1e-12)


def test_mixed_units_that_cannot_be_converted(tmp_path):
    text = "path,compound,concentration,unit\na.tif,cA,1,nM\nb.tif,cA,2,nM\nc.tif,cA,3,ug/mL\n"
    line = _line(_problem(tmp_path, text), 4)
    assert "column unit" in line and "'ug/mL'" in line and "'nM'" in line


def test_empty_layout(tmp_path):
    assert "lists no recordings" in _problem(tmp_path, "path,well\n\n,\n")


def test_empty_file(tmp_path):
    assert "lists no recordings" in _problem(tmp_path, "")


def test_missing_path_column(tmp_path):
    message = _problem(tmp_path, "file,well\na.tif,A1\n")
    assert "row 1, column path" in message


def test_repeated_and_reserved_column_names(tmp_path):
    message = _problem(tmp_path, "path,well,Well,recording_id\na.tif,A1,A2,x\n")
    assert "row 1, column well: 'well' names 2 columns" in message
    assert "row 1, column recording_id" in message


def test_unreadable_csv_with_extra_cells(tmp_path):
    message = _problem(tmp_path, "path,well\na.tif,A1\nb.tif,A2,oops\n")
    assert "cannot read layout" in message and "row 3 has more cells" in message


def test_unreadable_csv_not_utf8(tmp_path):
    layout = tmp_path / "layout.csv"
    layout.write_bytes(b"path,unit\na.tif,\xb5M\n")
    with pytest.raises(InputError, match=r"cannot read layout .*UTF-8"):
        read_layout(layout)


def test_missing_layout_file(tmp_path):
    with pytest.raises(InputError, match="cannot read layout"):
        read_layout(tmp_path / "nope.csv")


def test_every_problem_is_reported_at_once(tmp_path):
    text = "path,well,fps,role\na.tif,A1,50,\nmissing.tif,Z1,fast,boss\nb.tif,A2,,\n"
    message = _problem(tmp_path, text)
    assert message.splitlines()[0].endswith("the layout has 4 problems; fix each and run again:")
    columns = [line.split(":")[0].strip() for line in message.splitlines()[1:]]
    assert sorted(columns) == sorted(
        ["row 3, column path", "row 3, column well", "row 3, column fps", "row 3, column role"]
    )


# --- options_for ---------------------------------------------------------------------------


def test_options_for_gives_only_the_overrides_set_on_the_row(tmp_path):
    text = (
        "path,fps,pixel_size_um,wavelength_nm,kind,reference,regions\n"
        "a.tif,50,0.2,,HOLOGRAM,ref/bg.tif,\n"
        "b.tif,,,532,,,lab.tif\n"
        "c.tif,,,,,,\n"
    )
    files = ["a.tif", "b.tif", "c.tif", "ref/bg.tif", "lab.tif"]
    layout = read_layout(_write(tmp_path, text, files=files))
    options = [layout.options_for(row) for _, row in layout.table.iterrows()]
    assert options[0] == {
        "fps": 50.0,
        "pixel_size_um": 0.2,
        "kind": "hologram",
        "reference": os.path.join(tmp_path, "ref", "bg.tif"),
    }
    assert options[1] == {"wavelength_nm": 532.0, "regions": os.path.join(tmp_path, "lab.tif")}
    assert options[2] == {}


def test_options_for_a_layout_without_override_columns(tmp_path):
    layout = read_layout(_write(tmp_path, "path\na.tif\n", files=["a.tif"]))
    assert layout.options_for(layout.table.iloc[0]) == {}
