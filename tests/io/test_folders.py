"""Output folders written whole or not at all; names that would leave their parent refused."""

import os

import pytest

from beatlab.io.folders import atomic_folder, child_folder


def test_folder_appears_whole_and_replaces_an_earlier_one(tmp_path):
    target = tmp_path / "rec"
    with atomic_folder(target) as tmp:
        (tmp / "a.csv").write_text("1")
        assert not target.exists()  # nothing at the final place while writing
    assert sorted(p.name for p in target.iterdir()) == ["a.csv"]
    with atomic_folder(target) as tmp:
        (tmp / "b.csv").write_text("2")
    assert sorted(p.name for p in target.iterdir()) == ["b.csv"]  # replaced, not merged
    assert sorted(p.name for p in tmp_path.iterdir()) == ["rec"]  # no temporary left


def test_a_failure_or_interrupt_leaves_the_earlier_folder_as_it_was(tmp_path):
    target = tmp_path / "rec"
    with atomic_folder(target) as tmp:
        (tmp / "a.csv").write_text("1")
    for error in (RuntimeError, KeyboardInterrupt):
        with pytest.raises(error), atomic_folder(target) as tmp:
            (tmp / "half.csv").write_text("x")
            raise error()
        assert sorted(p.name for p in target.iterdir()) == ["a.csv"]
    assert sorted(p.name for p in tmp_path.iterdir()) == ["rec"]


def test_a_new_folder_gets_the_mode_of_the_umask(tmp_path):
    old = os.umask(0o022)
    try:
        with atomic_folder(tmp_path / "shared"):
            pass
    finally:
        os.umask(old)
    assert (tmp_path / "shared").stat().st_mode & 0o777 == 0o755  # colleagues can read it


@pytest.mark.parametrize("name", ["", ".", "..", "a/b", "../x", "/etc"])
def test_child_folder_refuses_names_that_leave_the_parent(tmp_path, name):
    with pytest.raises(ValueError, match="not a plain folder name"):
        child_folder(tmp_path, name)


def test_child_folder_of_a_plain_name(tmp_path):
    assert child_folder(tmp_path, "P1_A1_1") == tmp_path / "P1_A1_1"


def test_holds_other_files_tells_a_foreign_folder_from_an_earlier_run(tmp_path):
    from beatlab.io.folders import holds_other_files

    assert not holds_other_files(tmp_path / "missing", marker="summary.json")
    assert not holds_other_files(tmp_path, marker="summary.json")  # empty
    (tmp_path / "thesis.docx").write_text("x")
    assert holds_other_files(tmp_path, marker="summary.json")
    (tmp_path / "summary.json").write_text("{}")
    assert not holds_other_files(tmp_path, marker="summary.json")  # an earlier analysis
