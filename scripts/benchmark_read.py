"""`python scripts/benchmark_read.py [key=value ...]`: the same as `plantation benchmark-read [key=value ...]`."""

import sys

from plantation.cli import main

if __name__ == "__main__":
    sys.exit(main(["benchmark-read", *sys.argv[1:]]))
