"""`python scripts/assess.py [key=value ...]`: the same as `plantation assess [key=value ...]`."""

import sys

from plantation.cli import main

if __name__ == "__main__":
    sys.exit(main(["assess", *sys.argv[1:]]))
