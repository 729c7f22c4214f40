"""Module-level task functions for the pool tests (spawned processes import them by name)."""

import os


def square_or_die(x: int) -> int:
    """x squared; the process dies abruptly (as when killed or out of memory) for x == 3."""
    if x == 3:
        os._exit(9)
    return x * x
