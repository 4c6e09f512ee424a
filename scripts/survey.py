"""`python scripts/survey.py [key=value ...]`: the same as `plantation survey [key=value ...]`."""

import sys

from plantation.cli import main

if __name__ == "__main__":
    sys.exit(main(["survey", *sys.argv[1:]]))
