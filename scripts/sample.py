"""`python scripts/sample.py [key=value ...]`: the same as `plantation sample [key=value ...]`."""

import sys

from plantation.cli import main

if __name__ == "__main__":
    sys.exit(main(["sample", *sys.argv[1:]]))
