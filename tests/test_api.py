"""The public API: explicit names, no import-time side effects."""

import subprocess
import sys

import beatlab


def test_public_names_exist():
    for name in beatlab.__all__:
        assert hasattr(beatlab, name), name


def test_import_has_no_side_effects():
    code = (
        "import logging, sys, beatlab, beatlab.synth, beatlab.holography;"
        "assert 'matplotlib' not in sys.modules, 'matplotlib imported';"
        "assert not logging.getLogger().handlers, 'logging configured'"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    assert out.returncode == 0, out.stderr


def test_python_m_beatlab_version():
    out = subprocess.run(
        [sys.executable, "-m", "beatlab", "--version"], capture_output=True, text=True
    )
    assert out.returncode == 0 and beatlab.__version__ in out.stdout
