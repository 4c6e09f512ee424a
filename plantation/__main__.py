"""``python -m plantation <verb> [key=value ...]``: the same as the ``plantation`` command."""

import sys

from plantation.cli import main

if __name__ == "__main__":
    sys.exit(main())
