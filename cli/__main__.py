"""``python -m toothcomb.cli`` runs the command line."""

import sys

from .main import main

if __name__ == "__main__":
    sys.exit(main())
