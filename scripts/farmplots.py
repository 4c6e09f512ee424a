"""`python scripts/farmplots.py [key=value ...]`: the same as `plantation farmplots [key=value ...]`."""

import sys

from plantation.cli import main

if __name__ == "__main__":
    sys.exit(main(["farmplots", *sys.argv[1:]]))
