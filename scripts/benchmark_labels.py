"""`python scripts/benchmark_labels.py [key=value ...]`: the same as `plantation benchmark-labels [key=value ...]`."""

import sys

from plantation.cli import main

if __name__ == "__main__":
    sys.exit(main(["benchmark-labels", *sys.argv[1:]]))
