"""``python -m beatlab``."""

from beatlab.cli import run

if __name__ == "__main__":
    run()
