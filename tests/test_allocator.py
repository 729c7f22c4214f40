"""The command's allocator setting: freed memory is reused, not faulted in again."""

import subprocess
import sys

import pytest

from beatlab import _allocator

# Two arrays of 1 MB made and freed ten times (each written once): with glibc's defaults
# each new array gets fresh pages from the kernel (measured on Debian's glibc 2.36: 0.94
# page faults per page written); reusing the freed heap, a few (0.05).
_FAULTS_PER_PAGE = """
import resource, sys
import numpy as np
from beatlab._allocator import keep_freed_memory
if sys.argv[1] == "keep":
    assert keep_freed_memory()
n = 2**20 // 8
a = np.ones(n); b = np.ones(n); del a, b  # first use of the size
before = resource.getrusage(resource.RUSAGE_SELF).ru_minflt
for _ in range(10):
    a = np.ones(n); b = np.ones(n); del a, b
after = resource.getrusage(resource.RUSAGE_SELF).ru_minflt
print((after - before) / (10 * 2 * 256))
"""


def _faults_per_page(mode: str) -> float:
    done = subprocess.run(
        [sys.executable, "-c", _FAULTS_PER_PAGE, mode], capture_output=True, text=True,
        timeout=120, check=True,
    )  # fmt: skip
    return float(done.stdout)


@pytest.mark.skipif(_allocator._glibc() is None, reason="glibc (Linux) only")
def test_freed_arrays_are_reused_instead_of_faulted_in_again():
    default, kept = _faults_per_page("default"), _faults_per_page("keep")
    assert default > 0.5  # glibc's behaviour the setting changes (what makes this test fail)
    assert kept < 0.25 * default


def test_without_glibc_nothing_is_set(monkeypatch):
    monkeypatch.setattr(_allocator, "_glibc", lambda: None)
    assert _allocator.keep_freed_memory() is False


def test_the_console_command_keeps_freed_memory_but_main_does_not(monkeypatch):
    """``beatlab`` (cli.run) sets the allocator once, before the command; ``main`` (what a
    program embedding the command calls) leaves the process's allocator alone."""
    from beatlab import cli

    calls = []
    monkeypatch.setattr(_allocator, "keep_freed_memory", lambda: calls.append("set") or True)
    monkeypatch.setattr(cli, "main", lambda argv=None: calls.append("main") or 3)

    def leave(code):
        raise SystemExit(code)

    monkeypatch.setattr(cli.os, "_exit", leave)
    # not this test process's exit handlers
    monkeypatch.setattr(cli.atexit, "_run_exitfuncs", lambda: calls.append("exit handlers"))
    with pytest.raises(SystemExit) as ended:
        cli.run()
    assert ended.value.code == 3
    assert calls == ["set", "main", "exit handlers"]
