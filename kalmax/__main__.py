"""``python -m kalmax``: the same as the ``kalmax`` command."""

import sys

from .cli import main

if __name__ == "__main__":
    sys.exit(main())
