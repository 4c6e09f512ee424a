"""`python scripts/simulate.py [key=value ...]`: the same as `plantation simulate [key=value ...]`."""

import sys

from plantation.cli import main

if __name__ == "__main__":
    sys.exit(main(["simulate", *sys.argv[1:]]))
