"""`python scripts/benchmark_accuracy.py [key=value ...]`: the same as `plantation benchmark-accuracy [key=value ...]`."""

import sys

from plantation.cli import main

if __name__ == "__main__":
    sys.exit(main(["benchmark-accuracy", *sys.argv[1:]]))
