"""``python -m beatlab``."""

import sys

from beatlab.cli import main

if __name__ == "__main__":
    sys.exit(main())
