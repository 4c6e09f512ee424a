"""`python scripts/suggest.py [key=value ...]`: the same as `plantation suggest [key=value ...]`."""

import sys

from plantation.cli import main

if __name__ == "__main__":
    sys.exit(main(["suggest", *sys.argv[1:]]))
