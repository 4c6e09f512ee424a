"""`python scripts/map.py [key=value ...]`: the same as `plantation map [key=value ...]`."""

import sys

from plantation.cli import main

if __name__ == "__main__":
    sys.exit(main(["map", *sys.argv[1:]]))
