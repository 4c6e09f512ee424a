"""`python scripts/retrain.py [key=value ...]`: the same as `plantation retrain [key=value ...]`."""

import sys

from plantation.cli import main

if __name__ == "__main__":
    sys.exit(main(["retrain", *sys.argv[1:]]))
