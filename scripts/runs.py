"""`python scripts/runs.py [key=value ...]`: the same as `plantation runs [key=value ...]`."""

import sys

from plantation.cli import main

if __name__ == "__main__":
    sys.exit(main(["runs", *sys.argv[1:]]))
