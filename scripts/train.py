"""`python scripts/train.py [key=value ...]`: the same as `plantation train [key=value ...]`."""

import sys

from plantation.cli import main

if __name__ == "__main__":
    sys.exit(main(["train", *sys.argv[1:]]))
