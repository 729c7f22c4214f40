import json

import numpy as np
import pytest

from beatlab.io import atomic_path, write_json


def test_write_json_makes_values_json_ready(tmp_path):
    path = write_json(
        tmp_path / "s.json",
        {
            "a": np.float32(1.5),
            "b": np.int64(3),
            "c": float("nan"),
            "d": np.inf,
            "e": np.array([1.0, np.nan]),
            "f": np.bool_(True),
            "g": {"h": (1, 2)},
        },
    )
    data = json.loads(path.read_text())
    assert data == {
        "a": 1.5,
        "b": 3,
        "c": None,
        "d": None,
        "e": [1.0, None],
        "f": True,
        "g": {"h": [1, 2]},
    }


def test_atomic_path_keeps_the_old_file_on_failure(tmp_path):
    target = tmp_path / "out.txt"
    target.write_text("old")
    with pytest.raises(RuntimeError), atomic_path(target) as tmp:
        tmp.write_text("half")
        raise RuntimeError("crash")
    assert target.read_text() == "old"
    assert [p.name for p in tmp_path.iterdir()] == ["out.txt"]
    with atomic_path(target) as tmp:
        tmp.write_text("new")
    assert target.read_text() == "new"
