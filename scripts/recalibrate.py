"""`python scripts/recalibrate.py [key=value ...]`: the same as `plantation recalibrate [key=value ...]`."""

import sys

from plantation.cli import main

if __name__ == "__main__":
    sys.exit(main(["recalibrate", *sys.argv[1:]]))
