"""Safety: no code runs from data, and no layout cell can move an output out of its folder.

The source scan parses every module of the package (ast, so comments and docstrings do not
count) and fails on any way of turning file contents into code or objects: pickle and its
relatives, numpy loads with ``allow_pickle=True``, ``eval``/``exec``/``compile``, and YAML
loads without a safe loader. Configuration is TOML, parsed as data. Recording ids, which
name the per-recording output folders of a batch, are single plain path components whatever
the plate, well, fov and timepoint cells say.
"""

from __future__ import annotations

import ast
import os
import pickle
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from hypothesis import example, given, settings
from hypothesis import strategies as st

import beatlab
from beatlab.batch import validate_layout
from beatlab.config import load_config
from beatlab.errors import ConfigError, InputError
from beatlab.io import open_recording
from beatlab.io.folders import child_folder
from beatlab.results import read_analysis
from beatlab.synth import simulate_recording

PACKAGE = Path(beatlab.__file__).parent
MODULES = sorted(PACKAGE.rglob("*.py"))

#: Modules whose import alone means deserialising objects from bytes.
_OBJECT_LOADERS = {"pickle", "cPickle", "_pickle", "dill", "cloudpickle", "shelve", "marshal"}
#: Calls that load objects or code, whatever module they come from (by attribute name).
_LOADING_CALLS = {"read_pickle", "unsafe_load", "full_load", "Unpickler"}


def _parsed():
    for path in MODULES:
        yield path.relative_to(PACKAGE).as_posix(), ast.parse(path.read_text(encoding="utf-8"))


def _calls(tree):
    return [node for node in ast.walk(tree) if isinstance(node, ast.Call)]


def _keyword(call: ast.Call, name: str):
    return next((k.value for k in call.keywords if k.arg == name), None)


def test_the_scan_sees_the_whole_package():
    names = {path.relative_to(PACKAGE).as_posix() for path in MODULES}
    assert {"io/readers.py", "batch/layout.py", "config.py", "results.py"} <= names
    assert len(names) > 50


def test_no_pickle_or_object_loader_is_imported():
    for name, tree in _parsed():
        for node in ast.walk(tree):
            if isinstance(node, ast.Import):
                imported = {alias.name.split(".")[0] for alias in node.names}
            elif isinstance(node, ast.ImportFrom):
                imported = {(node.module or "").split(".")[0]}
            else:
                continue
            assert not imported & _OBJECT_LOADERS, (name, node.lineno)


def test_no_eval_exec_compile_or_object_loading_call():
    for name, tree in _parsed():
        for call in _calls(tree):
            func = call.func
            called = func.id if isinstance(func, ast.Name) else getattr(func, "attr", "")
            where = (name, call.lineno, ast.unparse(call)[:80])
            builtin = isinstance(func, ast.Name) or ast.unparse(func).startswith("builtins.")
            assert not (builtin and called in {"eval", "exec", "compile", "__import__"}), where
            assert called not in _LOADING_CALLS, where
            if called in ("load", "loads") and isinstance(func, ast.Attribute):
                owner = ast.unparse(func.value)
                assert owner not in _OBJECT_LOADERS | {"joblib", "torch"}, where


def test_yaml_is_only_loaded_safely():
    for name, tree in _parsed():
        for call in _calls(tree):
            text = ast.unparse(call.func)
            if text in ("yaml.load", "yaml.load_all"):
                loader = _keyword(call, "Loader")
                safe = loader is not None and "Safe" in ast.unparse(loader)
                assert safe, (name, call.lineno)


def _numpy_loads():
    """Every np.load / numpy.load call in the package: (module, call)."""
    found = []
    for name, tree in _parsed():
        direct = any(
            isinstance(n, ast.ImportFrom)
            and n.module == "numpy"
            and any(a.name == "load" for a in n.names)
            for n in ast.walk(tree)
        )
        for call in _calls(tree):
            text = ast.unparse(call.func)
            if text in ("np.load", "numpy.load") or (direct and text == "load"):
                found.append((name, call))
    return found


def test_numpy_loads_never_allow_pickles():
    loads = _numpy_loads()
    # the package reads .npy recordings and maps.npz: the scan must see both
    assert {"io/readers.py", "results.py"} <= {name for name, _ in loads}
    for name, call in loads:
        value = _keyword(call, "allow_pickle")
        # absent means numpy's default, False (numpy >= 1.16.3)
        assert value is None or (isinstance(value, ast.Constant) and value.value is False), (
            name,
            call.lineno,
        )
        assert not any(k.arg is None for k in call.keywords), (name, call.lineno)  # no **kw
    assert np.load.__kwdefaults__ is None or np.load.__kwdefaults__.get("allow_pickle") is not True


class _Tripwire:
    """An object whose unpickling writes a file: proof that a load ran code."""

    def __init__(self, marker: Path):
        self.marker = marker

    def __reduce__(self):
        return (Path.write_text, (self.marker, "unpickled"))


def test_a_pickled_npy_recording_is_refused_without_running_it(tmp_path):
    marker = tmp_path / "ran"
    frames = np.empty((2, 4, 4), dtype=object)
    frames[...] = _Tripwire(marker)
    np.save(tmp_path / "trap.npy", frames, allow_pickle=True)
    pickle.loads(pickle.dumps(_Tripwire(tmp_path / "check")))  # the trap works when loaded
    assert (tmp_path / "check").exists()
    with pytest.raises(InputError):
        open_recording(tmp_path / "trap.npy")
    assert not marker.exists()


@pytest.fixture(scope="module")
def saved_analysis(tmp_path_factory):
    sim = simulate_recording(shape_px=(64, 64), duration_s=2.0, fps=20, rng=4)
    from tests.pipeline.helpers import as_recording

    out = tmp_path_factory.mktemp("analysis")
    beatlab.analyze(as_recording(sim), workers=1).save(out, figures=False)
    return out


def test_a_pickled_maps_file_is_refused_without_running_it(saved_analysis, tmp_path):
    assert read_analysis(saved_analysis).beats is not None  # the folder reads as it is
    folder = tmp_path / "copy"
    folder.mkdir()
    for path in saved_analysis.iterdir():
        (folder / path.name).write_bytes(path.read_bytes())
    marker = tmp_path / "ran"
    trap = np.empty(1, dtype=object)
    trap[0] = _Tripwire(marker)
    with open(folder / "maps.npz", "wb") as handle:
        np.savez(handle, mask=trap)  # np.savez pickles object arrays
    with pytest.raises(InputError):
        read_analysis(folder)
    assert not marker.exists()


def test_config_is_toml_data_never_code(tmp_path):
    marker = tmp_path / "ran"
    code = tmp_path / "config.toml"
    code.write_text(f"import os\nos.makedirs({str(marker)!r})\n", encoding="utf-8")
    with pytest.raises(ConfigError, match="not valid TOML"):
        load_config(code)
    # a string that looks like code stays a string (and is refused as a value)
    lookalike = tmp_path / "lookalike.toml"
    lookalike.write_text(f"[flow]\nmethod = \"__import__('os').makedirs({str(marker)!r})\"\n")
    with pytest.raises(ConfigError, match=r"flow\.method"):
        load_config(lookalike)
    assert not marker.exists()


def test_config_is_parsed_by_tomllib_only():
    tree = ast.parse((PACKAGE / "config.py").read_text(encoding="utf-8"))
    parsers = {ast.unparse(c.func) for c in _calls(tree) if "loads" in ast.unparse(c.func)}
    assert parsers == {"tomllib.loads"}


# --------------------------------------------------------------------------------------------
# layout cells cannot steer output paths

UNSAFE = ["../../x", "/etc", "..", ".", "a/b", "a\\b", "/", "~", "x/../../..", "..\\..", " "]


def _is_plain_component(name: str) -> bool:
    return (
        bool(name)
        and name not in (".", "..")
        and "/" not in name
        and "\\" not in name
        and os.sep not in name
        and "\x00" not in name
        and Path(name).name == name
    )


def _ids(tmp_path, rows):
    (tmp_path / "r.tif").touch()
    table = pd.DataFrame(rows, dtype=object)
    table.insert(0, "path", "r.tif")
    return validate_layout(table, base_dir=tmp_path)["recording_id"].tolist()


@pytest.mark.parametrize("value", UNSAFE)
@pytest.mark.parametrize("column", ["plate", "fov", "timepoint"])
def test_recording_ids_from_path_like_cells_are_plain_names(tmp_path, column, value):
    rows = [{"well": "A1", column: value}, {"well": "B2", column: value + "y"}]
    ids = _ids(tmp_path, rows)
    out = tmp_path / "out"
    for rid in ids:
        assert _is_plain_component(rid), rid
        assert child_folder(out, rid).parent == out
        assert (out / rid).resolve().parent == out.resolve()


@pytest.mark.parametrize("well", ["../../x", "/etc", "..", "a/b", "A1/..", "."])
def test_path_like_wells_are_refused(tmp_path, well):
    with pytest.raises(InputError, match="not a well name"):
        _ids(tmp_path, [{"well": well}])


cell_text = st.one_of(st.sampled_from(UNSAFE), st.text(max_size=12))


@settings(max_examples=150, derandomize=True, database=None, deadline=None)
@given(plate=cell_text, fov=cell_text, timepoint=cell_text)
@example(plate="..", fov="..", timepoint="..")
@example(plate="/", fov="", timepoint="")
def test_any_cells_give_plain_recording_ids(tmp_path_factory, plate, fov, timepoint):
    base = tmp_path_factory.getbasetemp() / "ids"
    base.mkdir(exist_ok=True)
    row = {"well": "C3", "plate": plate, "fov": fov, "timepoint": timepoint}
    ids = _ids(base, [row])  # these columns are free text: never refused
    assert len(ids) == 1 and _is_plain_component(ids[0]), ids


@pytest.mark.parametrize("name", ["../../x", "/etc", "..", ".", "a/b", "", "/", "a/../b"])
def test_child_folder_refuses_names_that_leave_the_folder(tmp_path, name):
    with pytest.raises(ValueError, match="not a plain folder name"):
        child_folder(tmp_path, name)


@pytest.mark.parametrize("name", ["A1", "P1_A1_f2_pre", "rec-0123456789", ".._A1", "a.b"])
def test_child_folder_keeps_plain_names_inside(tmp_path, name):
    child = child_folder(tmp_path, name)
    assert child.parent == tmp_path and child.name == name
