"""``python -m sillmark`` runs the command line."""

import sys

from sillmark.cli import main

if __name__ == "__main__":
    sys.exit(main())
