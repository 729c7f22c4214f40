"""Package names that import their module on first use (PEP 562; private).

``beatlab``, ``beatlab.batch``, ``beatlab.plots`` and ``beatlab.report`` offer their public
names at the package level, but importing every module behind them costs seconds (the batch
runner, scipy.stats): a process that needs one piece, such as the figure process of
``beatlab analyze``, must not pay for the rest.
"""

from __future__ import annotations

import importlib
import sys
from collections.abc import Callable, Mapping

__all__ = ["lazy_names"]


def lazy_names(package: str, sources: Mapping[str, str]) -> tuple[Callable, Callable]:
    """``(__getattr__, __dir__)`` for `package`, whose names in `sources` (name -> module)
    are imported when first used and then kept in the package's namespace.

    Use as ``__getattr__, __dir__ = lazy_names(__name__, {...})`` in the package's
    ``__init__``; an unknown name is an AttributeError as usual.
    """

    def __getattr__(name: str):
        source = sources.get(name)
        if source is None:
            raise AttributeError(f"module {package!r} has no attribute {name!r}")
        value = getattr(importlib.import_module(source), name)
        setattr(sys.modules[package], name, value)
        return value

    def __dir__() -> list[str]:
        return sorted(set(vars(sys.modules[package])) | set(sources))

    return __getattr__, __dir__
