"""``python -m sgdstab``: the same command line as ``sgdstab``."""

import sys

from .cli.main import main

if __name__ == "__main__":
    sys.exit(main())
