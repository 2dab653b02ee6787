"""``python -m barrierflow`` runs the command line (see :mod:`barrierflow.cli`)."""

import sys

from .cli import main

if __name__ == "__main__":
    sys.exit(main())
