"""Output folders written whole or not at all."""

from __future__ import annotations

import contextlib
import os
import shutil
import tempfile
from collections.abc import Iterator
from pathlib import Path

__all__ = ["atomic_folder", "child_folder", "holds_other_files"]


def child_folder(parent: str | os.PathLike, name: str) -> Path:
    """``parent / name``, refusing a name that would leave `parent`.

    Parameters
    ----------
    parent : path-like
        The folder the child must stay in.
    name : str
        One path component (an id from a layout, say).

    Returns
    -------
    pathlib.Path

    Raises
    ------
    ValueError
        `name` is empty, ``.`` or ``..``, absolute, or holds a path separator.
    """
    bad = not name or name in (".", "..") or os.path.isabs(name)
    if bad or any(sep and sep in name for sep in (os.sep, os.altsep, "/")):
        raise ValueError(f"{name!r} is not a plain folder name; it must not leave {parent}")
    return Path(parent) / name


def holds_other_files(folder: str | os.PathLike, *, marker: str) -> bool:
    """Whether `folder` holds files but not `marker`: it is not beatlab's to replace.

    Parameters
    ----------
    folder : path-like
        An output folder about to be (re)written whole.
    marker : str
        A file that an earlier run of the same command leaves in it (``summary.json``).

    Returns
    -------
    bool
        False for a missing or empty folder and for an earlier run's folder.
    """
    folder = Path(folder)
    return folder.is_dir() and any(folder.iterdir()) and not (folder / marker).is_file()


@contextlib.contextmanager
def atomic_folder(path: str | os.PathLike) -> Iterator[Path]:
    """Yield a new empty folder beside ``path``; put it in place of ``path`` on success.

    Everything written into the yielded folder appears at ``path`` at once when the block
    ends without an exception: an existing folder at ``path`` is replaced (a re-run replaces
    the earlier result cleanly). On an exception or an interrupt the temporary folder is
    removed and an existing folder at ``path`` is left as it was, so ``path`` either holds a
    complete set of files or is unchanged.

    Parameters
    ----------
    path : path-like
        The folder to write. Its parent is created if needed.

    Yields
    ------
    pathlib.Path
        The temporary folder to write into (same file system as ``path``).
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=f".{path.name}.", suffix=".part", dir=path.parent))
    _keep_umask_mode(tmp)
    old = None
    try:
        yield tmp
        if path.exists() or path.is_symlink():
            old = Path(tempfile.mkdtemp(prefix=f".{path.name}.", suffix=".old", dir=path.parent))
            os.replace(path, old / "previous")
        os.replace(tmp, path)
    except BaseException:
        if old is not None and not path.exists():
            os.replace(old / "previous", path)  # put the earlier result back
        raise
    finally:
        shutil.rmtree(tmp, ignore_errors=True)
        if old is not None:
            shutil.rmtree(old, ignore_errors=True)


def _keep_umask_mode(folder: Path) -> None:
    """Give a ``mkdtemp`` folder (mode 0700) the mode a plain ``mkdir`` would have."""
    umask = os.umask(0)
    os.umask(umask)
    with contextlib.suppress(OSError):
        os.chmod(folder, 0o777 & ~umask)
